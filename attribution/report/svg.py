"""The inline SVG of the charts laid out by :mod:`~attribution.report.charts`, as markup.

Each function writes what the page shows of one chart in one pass of string formatting (a page has
two waterfalls, two line charts and seven pair bars, a thousand-book night two thousand of each):
every text (titles, labels, keys, class names, dates) is escaped with ``markupsafe.escape``;
numbers are written as Python writes them (``str`` of a float). Tick labels sit at fixed offsets
matching the layout constants of ``charts`` (waterfall plot top 22 px: labels at y 14; line chart
plot left 58 px: labels end at x 53).
"""

from __future__ import annotations

import markupsafe

from attribution.report import charts

_esc = markupsafe.escape


def _raw(value: float | None) -> str:
    return "" if charts.is_missing(value) else repr(float(value))  # type: ignore[arg-type]


def waterfall(w: charts.Waterfall, title: str) -> markupsafe.Markup:
    """A horizontal waterfall: gridlines and ticks, then per step its label, bar and value."""
    t = _esc(title)
    ticks = "".join(f'<text class="tick" x="{k.position}" y="14" text-anchor="middle">{_esc(k.label)}</text>'
                    for k in w.ticks)
    steps = "".join(
        f'<text class="{"value" if s.is_total else "label"}" x="{w.label_x}" y="{s.text_y}" text-anchor="end">'
        f"{_esc(s.label)}</text>\n"
        f'<rect class="{_esc(s.style)}" x="{s.x}" y="{s.bar_y}" width="{s.width}" height="{w.bar_height}"/>\n'
        f'<text class="value" id="wf-{_esc(s.key)}" data-value="{_raw(s.value)}" x="{w.value_x}" y="{s.text_y}" '
        f'text-anchor="end">{_esc(s.value_text)}</text>\n' for s in w.steps)
    return markupsafe.Markup(
        f'<svg class="chart" viewBox="0 0 {w.width} {w.height}" width="{w.width}" height="{w.height}" role="img" '
        f'aria-label="{t}">\n<title>{t}</title>\n<path class="grid" d="{_esc(w.grid_path)}"/>\n{ticks}'
        f'<line class="axis" x1="{w.zero_x}" x2="{w.zero_x}" y1="{w.plot_top - 4}" y2="{w.plot_bottom}"/>\n'
        f"{steps}</svg>\n")


def lines(c: charts.LineChart, title: str) -> markupsafe.Markup:
    """A line chart: gridlines and ticks, the nights' bars if any, the zero line, each series with its last dot,
    the first and last dates."""
    t = _esc(title)
    ticks = "".join(f'<text class="tick" x="53" y="{k.position}" dy="3" text-anchor="end">{_esc(k.label)}</text>'
                    for k in c.y_ticks)
    bars = f'<path class="bar-night" d="{_esc(c.bars_path)}"/>' if c.bars_path else ""
    series = "".join(f'<polyline class="{_esc(s.style)}" points="{_esc(s.points)}"/>\n'
                     f'<circle class="dot" cx="{s.last_x}" cy="{s.last_y}" r="2.5"/>\n' for s in c.series)
    return markupsafe.Markup(
        f'<svg class="chart" viewBox="0 0 {c.width} {c.height}" width="{c.width}" height="{c.height}" role="img" '
        f'aria-label="{t}">\n<title>{t}</title>\n<path class="grid" d="{_esc(c.grid_path)}"/>\n{ticks}{bars}'
        f'<line class="axis" x1="{c.plot_left}" x2="{c.plot_right}" y1="{c.zero_y}" y2="{c.zero_y}"/>\n{series}'
        f'<text class="tick" x="{c.plot_left}" y="{c.height - 6}">{_esc(c.first_date)}</text>\n'
        f'<text class="tick" x="{c.plot_right}" y="{c.height - 6}" text-anchor="end">{_esc(c.last_date)}</text>\n'
        f"</svg>\n")


def pair(b: charts.PairBar) -> markupsafe.Markup:
    """Two small bars on one zero line (Taylor above, revaluation below); a missing value draws no bar."""
    first = ("" if b.first_missing else
             f'<rect class="bar-first" x="{b.first_x}" y="2" width="{b.first_width}" height="6"/>')
    second = ("" if b.second_missing else
              f'<rect class="bar-second" x="{b.second_x}" y="10" width="{b.second_width}" height="6"/>')
    return markupsafe.Markup(
        f'<svg class="pair" viewBox="0 0 {b.width} 18" width="{b.width}" height="18" aria-hidden="true">'
        f'<line class="axis" x1="{b.zero_x}" x2="{b.zero_x}" y1="0" y2="18"/>{first}{second}</svg>')
