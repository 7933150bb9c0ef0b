"""Geometry of the report's inline SVG charts: waterfall, history lines and paired small bars.

The functions here are pure: numbers in, frozen dataclasses of pixel coordinates and label text
out. The SVG markup is written from them by :mod:`~attribution.report.svg` (every text escaped).
Number formatting used by both the charts and the page tables lives here too, so a figure reads
the same everywhere.
"""

from __future__ import annotations

import datetime as dt
import functools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

MISSING = "—"  # shown where the archive holds no value (NULL)


def is_missing(value: float | None) -> bool:
    """True for None and NaN (a NULL read back from the archive)."""
    return value is None or value != value


_SPECS = {d: f",.{d}f" for d in range(4)}


def format_amount(value: float | None, decimals: int = 0) -> str:
    """Thousands separators, a leading minus for negatives, never ``-0``; MISSING for NULL."""
    if value is None or value != value:
        return MISSING
    text = format(value, _SPECS.get(decimals) or f",.{decimals}f")
    if text[0] == "-" and not text.strip("-0.,"):
        return text[1:]
    return text


def format_amounts(values: Sequence[float | None]) -> list[str]:
    """``format_amount(v)`` for each value, whole units, in one pass (the tables' hot loop)."""
    texts = [MISSING if v is None or v != v else format(v, ",.0f") for v in values]
    return ["0" if t == "-0" else t for t in texts]


_EXACT_BELOW = 1e15  # |rounded value| below this: an exact int64, 15 digits at most


def amount_cell_rows(values: Sequence[Sequence[float | None]] | np.ndarray, prefix: str = "",
                     suffix: str = "") -> list[str]:
    """Per row of ``values``: ``prefix + format_amount(v) + suffix`` of each value, joined (the tables' hot loop).

    The text is :func:`format_amount`'s (whole units, round half to even on the exact binary value as
    ``format(v, ",.0f")`` rounds, never ``-0``), built for every value at once: digits and separators
    are written into a byte matrix one digit place at a time, NUL padding is dropped and the rows are
    decoded in one piece. NULL, non-finite and huge values take the scalar path. ``prefix`` and
    ``suffix`` are ASCII markup (``<td>``, ``</td>``), never text to escape.
    """
    v = np.asarray(values, dtype=float)
    if v.ndim != 2:
        v = v.reshape(len(v), -1)
    n, columns = v.shape
    if n == 0:
        return []
    cells, long_cells = _amount_bytes(v.ravel(), prefix.encode("ascii"), suffix.encode("ascii"))
    matrix = np.concatenate([cells.reshape(n, -1), np.full((n, 1), _ROW_END, dtype=np.uint8)], axis=1)
    texts = matrix.tobytes().translate(None, b"\0").decode("utf-8").split(chr(_ROW_END))[:-1]
    for row in sorted({i // columns for i in long_cells}):  # a value too long for the matrix: the whole row
        texts[row] = "".join(prefix + format_amount(float(x)) + suffix for x in v[row].tolist())
    return texts


_ROW_END = 1  # a byte no cell holds


def _amount_bytes(v: np.ndarray, head: bytes, tail: bytes) -> tuple[np.ndarray, list[int]]:
    """The UTF-8 bytes of each cell, NUL-padded (one row per value: head, the number right-aligned in a
    fixed field, tail), and the values whose text did not fit."""
    rounded = np.rint(v)
    fast = np.abs(rounded) < _EXACT_BELOW  # False for NaN and infinities
    whole = np.abs(np.where(fast, rounded, 0.0)).astype(np.int64)
    digits = np.ones(v.size, dtype=np.int64)
    for k in range(1, 15):
        digits += whole >= 10 ** k
    most = int(digits.max()) if v.size else 1
    field_end = len(head) + max(3, 1 + most + (most - 1) // 3)  # the longest number (or MISSING): less padding
    width = field_end + len(tail)
    columns = np.zeros((width, v.size), dtype=np.uint8)  # one byte place per row: contiguous writes
    columns[:len(head)] = np.frombuffer(head, dtype=np.uint8)[:, None]
    columns[field_end:] = np.frombuffer(tail, dtype=np.uint8)[:, None]
    rest = whole.astype(np.uint32) if v.size and int(whole.max()) < 2 ** 32 else whole  # faster division
    for k in range(most):  # the k-th digit from the right, then a separator after every third
        rest, digit = np.divmod(rest, rest.dtype.type(10))
        columns[field_end - 1 - k - k // 3] = (48 + digit) * (k < digits)
        if k % 3 == 2 and k < most - 1:
            columns[field_end - 2 - k - k // 3] = ord(",") * (digits > k + 1)
    negative = np.flatnonzero(fast & (rounded < 0))
    columns[field_end - 1 - (digits + (digits - 1) // 3)[negative], negative] = ord("-")
    out = np.ascontiguousarray(columns.T)
    missing = np.isnan(v)  # NULL: every such cell reads the same, written at once
    if missing.any():
        text = np.frombuffer(head + MISSING.encode("utf-8") + tail, dtype=np.uint8)
        out[missing] = 0
        out[missing, :text.size] = text
    too_long = []
    for i in np.flatnonzero(~fast & ~missing).tolist():  # infinities and huge values
        text = head + format_amount(float(v[i])).encode("utf-8") + tail
        out[i] = 0
        if len(text) <= width:
            out[i, :len(text)] = np.frombuffer(text, dtype=np.uint8)
        else:
            too_long.append(i)
    return out, too_long


def format_amount_cells(values: Sequence[float | None] | np.ndarray, prefix: str = "",
                        suffix: str = "") -> list[str]:
    """``prefix + format_amount(v) + suffix`` for each value, vectorised (see :func:`amount_cell_rows`)."""
    return amount_cell_rows(np.asarray(values, dtype=float).reshape(-1, 1), prefix, suffix)


def format_percent(share: float | None, decimals: int = 1) -> str:
    """A decimal share as a percentage (0.125 -> ``12.5 %``)."""
    if is_missing(share):
        return MISSING
    return f"{format_amount(100.0 * share, decimals)} %"


def format_compact(value: float) -> str:
    """Short axis label: ``-1.25m``, ``250k``, ``75``."""
    size = abs(value)
    for bound, suffix in ((1e9, "bn"), (1e6, "m"), (1e3, "k")):
        if size >= bound:
            scaled = value / bound
            text = f"{scaled:,.2f}".rstrip("0").rstrip(".")
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


def _domain(values: Sequence[float] | np.ndarray) -> tuple[float, float]:
    """[min, max] of the finite values and zero, widened when flat so a scale never divides by zero."""
    array = np.asarray(values, dtype=float)
    finite = array[np.isfinite(array)]
    low = min(0.0, float(finite.min())) if finite.size else 0.0
    high = max(0.0, float(finite.max())) if finite.size else 0.0
    if high - low < 1e-12:
        return low - 1.0, high + 1.0
    pad = 0.04 * (high - low)
    return (low - pad if low < 0 else low), (high + pad if high > 0 else high)


def _scale(low: float, high: float, start: float, end: float) -> Callable[[float], float]:
    """Linear map from [low, high] to pixels [start, end], rounded to a tenth of a pixel."""
    span = high - low

    def to_pixel(value: float) -> float:
        return round(start + (value - low) / span * (end - start), 1)
    return to_pixel


@dataclass(frozen=True, slots=True)
class Tick:
    """One gridline: pixel position and label."""

    position: float
    label: str


@dataclass(frozen=True, slots=True)
class WaterfallStep:
    """One row of the horizontal waterfall: a bar from ``x`` to ``x + width``; ``style`` is a CSS class."""

    key: str
    label: str
    value: float | None
    value_text: str
    x: float
    width: float
    bar_y: float
    text_y: float
    style: str
    is_total: bool
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
    bar_height: float
    label_x: float
    value_x: float
    ticks: tuple[Tick, ...]
    grid_path: str
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
    key, label, total_value = total
    total_end = 0.0 if is_missing(total_value) else float(total_value)
    domain = _domain([*ends, total_end])
    left, right, top = 168.0, width - 96.0, 22.0  # room for the longest label, 'Dividend / foreign rate (FX)'
    to_x = _scale(*domain, left, right)
    # Each running end placed once (a step starts where the one before it ends; the total starts at 0.0, ends[0]).
    xs = [to_x(e) for e in ends]
    spans = list(zip(xs[:-1], xs[1:], strict=True)) + [(xs[0], to_x(total_end))]
    values = [v for _, _, v, _ in steps] + [total_value]
    texts = format_amounts(values)
    text_ys = _row_text_ys(top, row_height, len(values))
    laid = []
    for row, ((k, lab, note), v, (a, b)) in enumerate(zip(
            [(k, lab, note) for k, lab, _, note in steps] + [(key, label, "")], values, spans, strict=True)):
        is_total = row == len(steps)
        style = "bar-total" if is_total else ("bar-rise" if v is None or not float(v) < 0 else "bar-fall")
        bar_y, text_y = text_ys[row]
        laid.append(WaterfallStep(k, lab, v, texts[row], min(a, b), round(abs(b - a), 1), bar_y, text_y, style,
                                  is_total, note))
    bottom = top + len(values) * row_height
    ticks = tuple(Tick(to_x(t), format_compact(t)) for t in nice_ticks(*domain))
    grid = "".join(f"M{t.position} {top - 4.0}V{bottom:.1f}" for t in ticks)
    return Waterfall(width, round(bottom + 8.0, 1), left, right, top, round(bottom, 1), xs[0],
                     round(row_height * 0.66, 1), left - 8.0, width - 6.0, ticks, grid, tuple(laid))


@functools.lru_cache(maxsize=16)
def _row_text_ys(top: float, row_height: float, rows: int) -> tuple[tuple[float, float], ...]:
    """(bar top, text baseline) of each waterfall row: the same on every chart of a layout, so worked out once."""
    return tuple((round(top + row * row_height + 3.0, 1), round(top + row * row_height + row_height * 0.62, 1))
                 for row in range(rows))


@dataclass(frozen=True, slots=True)
class Series:
    """One polyline of a line chart; ``style`` is a CSS class name of the stylesheet."""

    name: str
    style: str
    points: str
    last_x: float
    last_y: float


@dataclass(frozen=True, slots=True)
class LineChart:
    """Lines over nights with a zero line, horizontal gridlines, first/last date labels and optional bars.

    ``bars_path`` and ``grid_path`` are SVG path data (numbers and path commands only): one thin bar per
    night, one horizontal gridline per tick.
    """

    width: float
    height: float
    plot_left: float
    plot_right: float
    plot_top: float
    plot_bottom: float
    zero_y: float
    y_ticks: tuple[Tick, ...]
    grid_path: str
    first_date: str
    last_date: str
    series: tuple[Series, ...]
    bars_path: str
    nights: int


def _group_domains(matrix: np.ndarray, starts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per group of rows, [low, high] of the finite values and zero, padded and widened as in ``_domain``."""
    finite = np.isfinite(matrix)
    low = np.minimum(np.minimum.reduceat(np.where(finite, matrix, np.inf).min(axis=1), starts), 0.0)
    high = np.maximum(np.maximum.reduceat(np.where(finite, matrix, -np.inf).max(axis=1), starts), 0.0)
    flat = high - low < 1e-12
    pad = 0.04 * (high - low)
    padded_low = np.where(flat, low - 1.0, np.where(low < 0, low - pad, low))
    padded_high = np.where(flat, high + 1.0, np.where(high > 0, high + pad, high))
    return padded_low, padded_high


def _whole(values: np.ndarray) -> list[str]:
    """Pixel coordinates as whole-pixel text (NaN as 0; callers leave those points out)."""
    return list(map(str, np.rint(np.nan_to_num(values)).astype(np.int64).tolist()))


def line_charts(dates: Sequence[dt.date], starts: Sequence[int],
                lines: Sequence[tuple[str, str, Sequence[float] | np.ndarray]],
                bars: Sequence[float] | np.ndarray | None = None,
                width: float = 520.0, height: float = 190.0) -> list[LineChart]:
    """Many line charts at once: rows ``starts[g]`` up to the next start (or the end) make chart ``g``.

    Each line is (name, style, one value per row); ``bars`` (one per row) share each chart's y scale.
    Every chart has its own scale; NaN values are left out. The arithmetic runs over all rows at
    once; only the text of each chart is assembled per chart.
    """
    n = len(dates)
    left, right, top, bottom = 58.0, width - 12.0, 10.0, height - 24.0
    if n == 0:
        return [LineChart(width, height, left, right, top, bottom, bottom, (), "", "", "",
                          tuple(Series(name, style, "", left, bottom) for name, style, _ in lines), "", 0)
                for _ in starts]
    first = np.asarray(starts, dtype=np.int64)
    ends = np.append(first[1:], n)
    counts = ends - first
    group = np.repeat(np.arange(first.size), counts)
    columns = [np.asarray(values, dtype=float) for _, _, values in lines]
    bar_values = None if bars is None else np.asarray(bars, dtype=float)
    low, high = _group_domains(np.column_stack(columns + ([] if bar_values is None else [bar_values])), first)
    per_unit = (bottom - top) / (high - low)
    step = (right - left) / np.maximum(counts - 1, 1)
    xs = np.where(counts[group] > 1, left + (np.arange(n) - first[group]) * step[group], (left + right) / 2.0)

    def y_of(values: np.ndarray) -> np.ndarray:
        return bottom - (values - low[group]) * per_unit[group]

    x_text = _whole(xs)
    rows = np.arange(n)
    drawn = []
    for (name, style, _), values in zip(lines, columns, strict=True):
        finite = np.isfinite(values)
        ys = y_of(values)
        points = [f"{x},{y}" if ok else "" for x, y, ok in zip(x_text, _whole(ys), finite.tolist(), strict=True)]
        last = np.maximum.reduceat(np.where(finite, rows, -1), first)
        drawn.append((name, style, points, last, xs, ys))
    zero = np.round(bottom + low * per_unit, 1)
    bar_text = [""] * n
    if bar_values is not None:
        half = np.clip(step * 0.3, 0.5, 4.0)[group]
        base = _whole(np.full(n, bottom) + low[group] * per_unit[group])
        bar_text = [f"M{a} {z}V{t}H{b}V{z}z" if ok else "" for a, b, z, t, ok in
                    zip(_whole(xs - half), _whole(xs + half), base, _whole(y_of(bar_values)),
                        np.isfinite(bar_values).tolist(), strict=True)]
    charts = []
    for g, (s, e) in enumerate(zip(first.tolist(), ends.tolist(), strict=True)):
        series = tuple(Series(name, style, " ".join(p for p in points[s:e] if p),
                              *((round(float(px[last[g]]), 1), round(float(py[last[g]]), 1)) if last[g] >= s
                                else (left, bottom)))
                       for name, style, points, last, px, py in drawn)
        ticks = tuple(Tick(round(bottom - (t - low[g]) * per_unit[g], 1), format_compact(t))
                      for t in nice_ticks(float(low[g]), float(high[g])))
        charts.append(LineChart(width, height, left, right, top, bottom, float(zero[g]), ticks,
                                "".join(f"M{left} {t.position}H{right}" for t in ticks),
                                dates[s].isoformat(), dates[e - 1].isoformat(), series, "".join(bar_text[s:e]),
                                e - s))
    return charts


def line_chart(dates: Sequence[dt.date], lines: Sequence[tuple[str, str, Sequence[float] | np.ndarray]],
               bars: Sequence[float] | np.ndarray | None = None, width: float = 520.0,
               height: float = 190.0) -> LineChart:
    """One line chart over ``dates`` (see :func:`line_charts`)."""
    return line_charts(dates, [0], lines, bars, width, height)[0]


@dataclass(frozen=True, slots=True)
class PairBar:
    """Two small bars on one shared zero line: the first method above, the second below."""

    first_x: float
    first_width: float
    second_x: float
    second_width: float
    zero_x: float
    width: float
    first_missing: bool
    second_missing: bool


def pair_bars(pairs: Sequence[tuple[float | None, float | None]], width: float = 110.0) -> tuple[PairBar, ...]:
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
        out.append(PairBar(round(min(zero, zero + a), 1), round(abs(a), 1), round(min(zero, zero + b), 1),
                           round(abs(b), 1), zero, width, is_missing(first), is_missing(second)))
    return tuple(out)
