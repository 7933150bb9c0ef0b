"""Geometry of the report's inline SVG charts: waterfall, history lines and paired small bars.

The functions here are pure: numbers in, frozen dataclasses of pixel coordinates and label text
out. The SVG markup itself lives in ``templates/charts.html`` (Jinja2 macros, autoescaped), so no
markup is assembled by string concatenation. Number formatting used by both the charts and the
page tables lives here too, so a figure reads the same everywhere.
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Sequence
from dataclasses import dataclass

MISSING = "—"  # shown where the archive holds no value (NULL)


def is_missing(value: float | None) -> bool:
    """True for None and NaN (a NULL read back from the archive)."""
    return value is None or value != value


def format_amount(value: float | None, decimals: int = 0) -> str:
    """Thousands separators, a leading minus for negatives, never ``-0``; MISSING for NULL."""
    if is_missing(value):
        return MISSING
    text = f"{value:,.{decimals}f}"
    if text.startswith("-") and not text.strip("-0.,"):
        return text[1:]
    return text


def format_percent(share: float | None, decimals: int = 1) -> str:
    """A decimal share as a percentage (0.125 -> ``12.5 %``)."""
    if is_missing(share):
        return MISSING
    return f"{format_amount(100.0 * share, decimals)} %"


def format_compact(value: float) -> str:
    """Short axis label: ``-1.2m``, ``250k``, ``75``."""
    size = abs(value)
    for bound, suffix in ((1e9, "bn"), (1e6, "m"), (1e3, "k")):
        if size >= bound:
            scaled = value / bound
            text = f"{scaled:,.1f}".rstrip("0").rstrip(".")
            return ("0" if text in ("-0", "") else text) + suffix
    return format_amount(value)


def nice_ticks(low: float, high: float, count: int = 4) -> tuple[float, ...]:
    """Round tick values covering [low, high] (1, 2, 2.5 or 5 times a power of ten apart)."""
    if not (math.isfinite(low) and math.isfinite(high)) or high <= low:
        return (0.0,)
    raw = (high - low) / max(count, 1)
    power = 10.0 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1.0, 2.0, 2.5, 5.0, 10.0) if m * power >= raw)
    first = math.ceil(low / step - 1e-9)
    last = math.floor(high / step + 1e-9)
    return tuple(k * step for k in range(first, last + 1))


def _domain(values: Sequence[float]) -> tuple[float, float]:
    """[min, max] of the values and zero, widened when flat so a scale never divides by zero."""
    finite = [v for v in values if math.isfinite(v)]
    low, high = min([0.0, *finite]), max([0.0, *finite])
    if high - low < 1e-12:
        return low - 1.0, high + 1.0
    pad = 0.04 * (high - low)
    return (low - pad if low < 0 else low), (high + pad if high > 0 else high)


def _scale(low: float, high: float, start: float, end: float):
    span = high - low

    def to_pixel(value: float) -> float:
        return start + (value - low) / span * (end - start)
    return to_pixel


@dataclass(frozen=True, slots=True)
class Tick:
    """One gridline: pixel position and label."""

    position: float
    label: str


@dataclass(frozen=True, slots=True)
class WaterfallStep:
    """One row of the horizontal waterfall: a bar from ``x`` to ``x + width`` at row ``y``."""

    key: str
    label: str
    value: float | None
    value_text: str
    x: float
    width: float
    y: float
    is_total: bool
    falls: bool
    note: str


@dataclass(frozen=True, slots=True)
class Waterfall:
    """A horizontal waterfall from zero, through each step, to the total."""

    width: float
    height: float
    plot_left: float
    plot_right: float
    plot_top: float
    plot_bottom: float
    zero_x: float
    row_height: float
    bar_height: float
    ticks: tuple[Tick, ...]
    steps: tuple[WaterfallStep, ...]


def waterfall(steps: Sequence[tuple[str, str, float | None, str]], total: tuple[str, str, float | None],
              width: float = 760.0, row_height: float = 21.0) -> Waterfall:
    """Lay out ``steps`` (key, label, amount or None, note) as running bars, then the total bar.

    A missing amount draws no bar and moves nothing; the running sum of the steps ends where
    the total starts from zero (the caller passes steps that add up to the total).
    """
    running, ends = 0.0, [0.0]
    for _, _, value, _ in steps:
        running += 0.0 if is_missing(value) else float(value)
        ends.append(running)
    total_value = total[2]
    domain = _domain([*ends, 0.0 if is_missing(total_value) else float(total_value)])
    left, right, top = 170.0, width - 110.0, 22.0
    to_x = _scale(*domain, left, right)
    bar_height = row_height * 0.66
    laid: list[WaterfallStep] = []
    for row, (key, label, value, note) in enumerate(steps):
        a, b = to_x(ends[row]), to_x(ends[row + 1])
        laid.append(WaterfallStep(key, label, value, format_amount(value), min(a, b), abs(b - a),
                                  top + row * row_height, False, (value or 0.0) < 0, note))
    key, label, value = total
    a, b = to_x(0.0), to_x(0.0 if is_missing(value) else float(value))
    laid.append(WaterfallStep(key, label, value, format_amount(value), min(a, b), abs(b - a),
                              top + len(steps) * row_height, True, (value or 0.0) < 0, ""))
    bottom = top + (len(steps) + 1) * row_height
    ticks = tuple(Tick(to_x(t), format_compact(t)) for t in nice_ticks(*domain))
    return Waterfall(width, bottom + 8.0, left, right, top, bottom, to_x(0.0), row_height, bar_height, ticks,
                     tuple(laid))


@dataclass(frozen=True, slots=True)
class Series:
    """One polyline of a line chart; ``style`` is a CSS class name of the stylesheet."""

    name: str
    style: str
    points: str
    last_x: float
    last_y: float


@dataclass(frozen=True, slots=True)
class Bar:
    """A thin vertical bar of a line chart (one night)."""

    x: float
    y: float
    width: float
    height: float


@dataclass(frozen=True, slots=True)
class LineChart:
    """Lines over dates with a zero line, horizontal gridlines and first/last date labels."""

    width: float
    height: float
    plot_left: float
    plot_right: float
    plot_top: float
    plot_bottom: float
    zero_y: float
    y_ticks: tuple[Tick, ...]
    first_date: str
    last_date: str
    series: tuple[Series, ...]
    bars: tuple[Bar, ...]
    nights: int


def line_chart(dates: Sequence[dt.date], lines: Sequence[tuple[str, str, Sequence[float]]],
               bars: Sequence[float] = (), width: float = 520.0, height: float = 190.0) -> LineChart:
    """Plot each (name, style, values) line against night index; optional bars share the y scale."""
    count = len(dates)
    every = [float(v) for _, _, values in lines for v in values] + [float(v) for v in bars]
    domain = _domain(every)
    left, right, top, bottom = 58.0, width - 12.0, 10.0, height - 24.0
    to_y = _scale(*domain, bottom, top)
    step = (right - left) / max(count - 1, 1)

    def x_at(i: int) -> float:
        return left + (i * step if count > 1 else (right - left) / 2.0)
    series = []
    for name, style, values in lines:
        coords = [(x_at(i), to_y(float(v))) for i, v in enumerate(values) if math.isfinite(float(v))]
        points = " ".join(f"{x:.1f},{y:.1f}" for x, y in coords)
        last = coords[-1] if coords else (left, to_y(0.0))
        series.append(Series(name, style, points, last[0], last[1]))
    zero = to_y(0.0)
    bar_width = max(min(step * 0.6, 8.0), 1.0)
    drawn = tuple(Bar(x_at(i) - bar_width / 2.0, min(to_y(v), zero), bar_width, abs(to_y(v) - zero))
                  for i, v in enumerate(float(b) for b in bars) if math.isfinite(v))
    ticks = tuple(Tick(to_y(t), format_compact(t)) for t in nice_ticks(*domain))
    first = dates[0].isoformat() if count else ""
    last = dates[-1].isoformat() if count else ""
    return LineChart(width, height, left, right, top, bottom, zero, ticks, first, last, tuple(series), drawn, count)


@dataclass(frozen=True, slots=True)
class PairBar:
    """Two small bars on one shared zero line: the first method above, the second below."""

    first_x: float
    first_width: float
    second_x: float
    second_width: float
    zero_x: float
    first_missing: bool
    second_missing: bool


def pair_bars(pairs: Sequence[tuple[float | None, float | None]], width: float = 150.0) -> tuple[PairBar, ...]:
    """Small bars for a table of (first, second) values, all rows on one scale so rows compare."""
    values = [float(v) for pair in pairs for v in pair if not is_missing(v)]
    top = max([abs(v) for v in values] + [0.0])
    half = (width - 4.0) / 2.0
    zero = width / 2.0
    per_unit = half / top if top > 0 else 0.0
    out = []
    for first, second in pairs:
        a = 0.0 if is_missing(first) else float(first) * per_unit
        b = 0.0 if is_missing(second) else float(second) * per_unit
        out.append(PairBar(min(zero, zero + a), abs(a), min(zero, zero + b), abs(b), zero,
                           is_missing(first), is_missing(second)))
    return tuple(out)
