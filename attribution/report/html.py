"""HTML of the pages: the Jinja2 environment (autoescape on) and the cell filters of the hot loops."""

from __future__ import annotations

import functools
from collections.abc import Sequence

import jinja2
import markupsafe

from attribution.report import charts, svg
from attribution.report.pages import BookPage, MethodRow, NightView, State

EXCEPTIONS_SHOWN = 50  # rows listed on a book page; the night's exceptions page lists them all


def _cells(texts: Sequence[str]) -> str:
    return "<td>" + "</td><td>".join(texts) + "</td>" if texts else ""


def amount_cells(values: Sequence[float | None]) -> markupsafe.Markup:
    """Table cells of formatted amounts, one ``<td>`` each, in one call (the pages' hot loop).

    The cell text comes from :func:`charts.format_amounts` only (digits, separators, a minus
    sign or the missing-value dash), so it holds nothing to escape.
    """
    return markupsafe.Markup(_cells(charts.format_amounts(values)))


def badge(state: State) -> markupsafe.Markup:
    """A state as its coloured mark and its word (the tone names the colour class)."""
    esc = markupsafe.escape
    return markupsafe.Markup(f'<span class="state state-{esc(state.tone)}"><span class="mark"></span>'
                             f"{esc(state.word)}</span>")


def _raw(value: float | None) -> str:
    return "" if charts.is_missing(value) else repr(float(value))  # type: ignore[arg-type]


def method_rows(methods: Sequence[MethodRow]) -> markupsafe.Markup:
    """The factor rows of the two methods' table: each method's amount with its exact value, the difference
    and the paired bars (a cross line's revaluation is shared into spot and vol; a missing one not computed)."""
    esc, amount = markupsafe.escape, charts.format_amount
    rows = []
    for m in methods:
        if m.key == "cross" and not charts.is_missing(m.revaluation):
            reval: str = '<span class="sub">in spot and vol</span>'
        elif charts.is_missing(m.revaluation):
            reval = '<span class="sub">not computed</span>'
        else:
            reval = esc(amount(m.revaluation))
        key = esc(m.key)
        rows.append(f'<tr><td class="t">{esc(m.label)} <span class="sub small">{esc(m.taylor_terms)}</span></td>'
                    f'<td id="m-{key}-taylor" data-value="{_raw(m.taylor)}">{esc(amount(m.taylor))}</td>'
                    f'<td id="m-{key}-reval" data-value="{_raw(m.revaluation)}">{reval}</td>'
                    f'<td id="m-{key}-diff" data-value="{_raw(m.difference)}">{esc(amount(m.difference))}</td>'
                    f'<td class="t">{svg.pair(m.bar)}</td></tr>\n')
    return markupsafe.Markup("".join(rows))


def _format_quantity(value: float | None) -> str:
    if charts.is_missing(value):
        return charts.MISSING
    return charts.format_amount(value, 0 if float(value).is_integer() else 2)  # type: ignore[arg-type]


def _bytecode_cache() -> jinja2.BytecodeCache | None:
    """Jinja2's cache of compiled templates in the user's private temporary folder (keyed by each template's
    source checksum, so a changed template is compiled again), or none where no safe folder exists."""
    try:
        return jinja2.FileSystemBytecodeCache()
    except RuntimeError:
        return None


def make_environment(bytecode_cache: jinja2.BytecodeCache | None = None) -> jinja2.Environment:
    """The report's Jinja2 environment: package templates, autoescape on for every template."""
    env = jinja2.Environment(loader=jinja2.PackageLoader("attribution.report", "templates"), autoescape=True,
                             undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True,
                             auto_reload=False, bytecode_cache=bytecode_cache)
    env.filters["amount"] = charts.format_amount
    env.filters["percent"] = charts.format_percent
    env.filters["ratio"] = lambda v: charts.format_amount(v, 3)
    env.filters["fx_rate"] = lambda v: charts.MISSING if charts.is_missing(v) else f"{float(v):.6g}"  # 0.00667 JPY
    env.filters["raw"] = _raw
    env.filters["quantity"] = _format_quantity
    env.filters["amount_cells"] = amount_cells
    env.filters["file_name"] = lambda path: str(path).replace("\\", "/").rsplit("/", 1)[-1]
    env.globals["missing"] = charts.is_missing
    env.globals["badge"] = badge
    env.globals["method_rows"] = method_rows
    env.globals["chart"] = svg  # chart.waterfall, chart.lines, chart.pair: SVG markup written in Python
    env.globals["exceptions_shown"] = EXCEPTIONS_SHOWN
    return env


@functools.lru_cache(maxsize=1)
def _environment() -> jinja2.Environment:
    """The environment the pages are rendered with: made once per process, its templates compiled once (and
    read back from the bytecode cache by the next process), since compiling them costs more than a small
    night's pages."""
    return make_environment(_bytecode_cache())


def render_files(night: NightView, pages: list[BookPage]) -> dict[str, str]:
    """The night's files by name: ``index.html``, ``exceptions.html`` and one page per book."""
    env = _environment()
    footer = markupsafe.Markup(env.get_template("footer.html").render(night=night))  # the same on every page
    book_template = env.get_template("book.html")
    files = {"index.html": env.get_template("index.html").render(night=night, footer=footer),
             "exceptions.html": env.get_template("exceptions.html").render(night=night, footer=footer)}
    for page in pages:
        files[page.summary.file_name] = book_template.render(page=page, night=night, footer=footer)
    desk_template = env.get_template("desk.html")
    for desk in night.desks:
        files[desk.file_name] = desk_template.render(desk=desk, night=night, footer=footer)
    return files
