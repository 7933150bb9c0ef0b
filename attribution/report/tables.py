"""The book pages' large tables as HTML rows for every book at once: numbers formatted per column, text escaped once.

A night of a thousand books shows a few hundred thousand table rows. Rendering them cell by cell through
template filters costs a function call and an escape per cell; here each table's numbers are formatted
vectorised (:func:`charts.amount_cell_rows`), its text escaped once per row (``markupsafe.escape``), the
rows joined, and the result split by book into :class:`~attribution.report.pages.Rows`. The markup of
each row is the one the templates had for it (the templates now place the rows whole).
"""

from __future__ import annotations

from collections.abc import Sequence

import markupsafe
import numpy as np
import pandas as pd

from attribution.report import charts
from attribution.report.pages import Rows
from attribution.report.queries import TERM_COLUMNS

_NEW_TRADE_AT = TERM_COLUMNS.index("pnl_new_trade")  # its cell shows the unpriced count, or 'unpriced'


def texts(frame: pd.DataFrame, column: str) -> list[str]:
    """A column as strings, NULL as the empty string."""
    if not len(frame):
        return []
    return frame[column].astype("string").fillna("").tolist()


def escaped(frame: pd.DataFrame, column: str) -> list[str]:
    """A column as escaped HTML text (NULL as the empty string), each distinct text escaped once."""
    if not len(frame):
        return []
    codes, distinct = pd.factorize(frame[column].astype("string").fillna(""), sort=False)
    shown = np.array([str(markupsafe.escape(t)) for t in distinct], dtype=object)
    return shown[codes].tolist() if len(shown) else [""] * len(frame)


def floats(frame: pd.DataFrame, columns: Sequence[str]) -> np.ndarray:
    """The columns as a float matrix, NULL as NaN (shown as missing)."""
    return frame[list(columns)].to_numpy(dtype=float, na_value=float("nan")).reshape(len(frame), len(columns))


def cells(values: np.ndarray) -> list[str]:
    """Each row's amounts as ``<td>`` cells, joined."""
    return charts.amount_cell_rows(values, "<td>", "</td>")


def by_book(frame: pd.DataFrame, rows: list[str]) -> dict[str, Rows]:
    """Rows of a frame sorted by book, joined per book."""
    if not len(frame):
        return {}
    books = frame["book"].tolist()
    codes = pd.factorize(frame["book"], sort=False)[0]
    starts = np.flatnonzero(np.diff(codes, prepend=-1) != 0).tolist()
    out: dict[str, Rows] = {}
    for start, end in zip(starts, [*starts[1:], len(books)], strict=True):
        out[str(books[start])] = Rows(markupsafe.Markup("".join(rows[start:end])), end - start)
    return out


def labelled_amounts(frame: pd.DataFrame, label: str, counts: str | None, values: Sequence[str]) -> dict[str, Rows]:
    """``<tr><td class="t">label</td>[<td>count</td>]amounts</tr>`` per row, by book."""
    if not len(frame):
        return {}
    labels = escaped(frame, label)
    amounts = cells(floats(frame, values))
    if counts is None:
        rows = [f'<tr><td class="t">{a}</td>{b}</tr>\n' for a, b in zip(labels, amounts, strict=True)]
    else:
        rows = [f'<tr><td class="t">{a}</td><td>{n}</td>{b}</tr>\n'
                for a, n, b in zip(labels, escaped(frame, counts), amounts, strict=True)]
    return by_book(frame, rows)


def underlying_rows(frame: pd.DataFrame, terms: Sequence[str]) -> dict[str, Rows]:
    """The by-underlying P&L table: positions, the terms, and the unpriced count beside new trades."""
    if not len(frame):
        return {}
    values = floats(frame, terms)
    before = cells(values[:, :_NEW_TRADE_AT])
    new_trade = charts.amount_cell_rows(values[:, _NEW_TRADE_AT:_NEW_TRADE_AT + 1], "<td>")
    after = cells(values[:, _NEW_TRADE_AT + 1:])
    notes = ["" if u == "0" else f' <span class="sub">({u} unpriced)</span>' for u in escaped(frame, "unpriced")]
    rows = [f'<tr><td class="t">{label}</td><td>{n}</td>{a}{b}{note}</td>{c}</tr>\n'
            for label, n, note, a, b, c in zip(escaped(frame, "underlying"), escaped(frame, "positions"), notes,
                                               before, new_trade, after, strict=True)]
    return by_book(frame, rows)


def _quantities(values: np.ndarray) -> list[str]:
    """Quantities as cells: whole contracts without decimals, fractions with two (vectorised where whole)."""
    whole = np.isnan(values) | (values == np.rint(values))
    out = cells(np.where(whole, values, np.nan))
    for i in np.flatnonzero(~whole.all(axis=1)).tolist():
        out[i] = "".join(f"<td>{charts.format_amount(v, 0 if v.is_integer() else 2)}</td>" if v == v
                         else f"<td>{charts.MISSING}</td>" for v in values[i].tolist())
    return out


def position_rows(frame: pd.DataFrame, text: Sequence[str], values: Sequence[str]) -> dict[str, Rows]:
    """The top positions: trade, instrument, underlying, status with limit word and flags, quantities, terms;
    a NULL day-one P&L is unpriced."""
    if not len(frame):
        return {}
    numbers = floats(frame, values)
    before = cells(numbers[:, 2:2 + _NEW_TRADE_AT])
    new_trade = charts.format_amount_cells(numbers[:, 2 + _NEW_TRADE_AT], "<td>", "</td>")
    unpriced = np.flatnonzero(np.isnan(numbers[:, 2 + _NEW_TRADE_AT])).tolist()
    for i in unpriced:
        new_trade[i] = "<td>unpriced</td>"
    after = cells(numbers[:, 3 + _NEW_TRADE_AT:])
    quantities = _quantities(numbers[:, :2])
    instrument_col, underlying_col, status_col, flags_col, limit_col = text
    instrument, underlying, status = (escaped(frame, c) for c in (instrument_col, underlying_col, status_col))
    flag_lines = [f'<br><span class="sub small">{t}</span>' if t else "" for t in
                  escaped(frame.assign(shown_flags=texts(frame, flags_col)).assign(
                      shown_flags=lambda f: f["shown_flags"].str.replace(",", ", ", regex=False)), "shown_flags")]
    limit = escaped(frame, limit_col)
    limit_words = [f" &middot; <strong>{t}</strong>" if t and t != "within" else "" for t in limit]
    rows = [f'<tr class="row-{lim}"><td class="t">{trade}</td><td class="t">{ins}</td><td class="t">{und}</td>'
            f'<td class="t wrap">{st}{word}{flag}</td>{q}{a}{b}{c}</tr>\n'
            for lim, trade, ins, und, st, word, flag, q, a, b, c in zip(
                limit, escaped(frame, "trade_id"), instrument, underlying, status, limit_words, flag_lines,
                quantities, before, new_trade, after, strict=True)]
    return by_book(frame, rows)


def hedging_rows(frame: pd.DataFrame, values: Sequence[str]) -> dict[str, Rows]:
    """Options, hedges and book per underlying; every amount with its exact value in ``data-value``."""
    if not len(frame):
        return {}
    numbers = floats(frame, values)
    columns = []
    for j in range(numbers.shape[1]):
        shown = charts.format_amount_cells(numbers[:, j])
        raw = ["" if v != v else repr(v) for v in numbers[:, j].tolist()]
        columns.append([f'<td data-value="{r}">{a}</td>' for r, a in zip(raw, shown, strict=True)])
    rows = [f'<tr><td class="t">{label}</td>{"".join(row)}</tr>\n'
            for label, *row in zip(escaped(frame, "underlying"), *columns, strict=True)]
    return by_book(frame, rows)


def currency_rows(frame: pd.DataFrame, values: Sequence[str]) -> dict[str, Rows]:
    """FX exposure per currency: positions, value in the currency, the rate (six significant digits), the rest."""
    if not len(frame):
        return {}
    numbers = floats(frame, values)
    local, rest = cells(numbers[:, :1]), cells(numbers[:, 2:])
    rates = [charts.MISSING if v != v else f"{v:.6g}" for v in numbers[:, 1].tolist()]
    rows = [f'<tr><td class="t">{label}</td><td>{n}</td>{a}<td>{rate}</td>{b}</tr>\n'
            for label, n, a, rate, b in zip(escaped(frame, "currency"), escaped(frame, "positions"), local, rates,
                                            rest, strict=True)]
    return by_book(frame, rows)


def to_date_rows(books: Sequence[str], columns: Sequence[tuple[str, str]], values: np.ndarray) -> dict[str, Rows]:
    """Per book the night / month-to-date / year-to-date table: ``values`` is books x terms x 3."""
    n_books, n_terms = len(books), len(columns)
    amounts = cells(values.reshape(n_books * n_terms, 3))
    esc = markupsafe.escape
    heads = [f'<tr id="td-{esc(c)}"><td class="t">{esc(label)}</td>' for c, label in columns]
    out = {}
    for b, book in enumerate(books):
        part = amounts[b * n_terms:(b + 1) * n_terms]
        out[book] = Rows(markupsafe.Markup("".join(f"{h}{a}</tr>\n" for h, a in zip(heads, part, strict=True))),
                         n_terms)
    return out
