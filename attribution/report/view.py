"""The nightly HTML explanation report: an index and one page per book, read from the archive.

:func:`render_night` loads the night's figures with a handful of set-based queries (every value
passed as a parameter), groups them by book in pandas, lays out the charts
(:mod:`attribution.charts`) and renders the Jinja2 templates of ``attribution/templates`` with
autoescaping on. Pages are self-contained (inline CSS and SVG, no script, nothing fetched) and
printable. All files of a night are written to a temporary folder beside the target and moved
into place at the end, so a reader never sees a half-written night.
"""

from __future__ import annotations

import datetime as dt
import fcntl
import hashlib
import json
import os
import re
import secrets
import shutil
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TypeVar

import duckdb
import jinja2
import markupsafe
import numpy as np
import pandas as pd

from attribution import charts
from attribution.config import JobConfig
from attribution.schema import BOOK_PNL, BOOK_QUALITY, EXPOSURE_COLUMNS, RUNS, TAYLOR_TERMS
from attribution.timebasis import TimeBasis

TERM_COLUMNS: tuple[str, ...] = (
    "pnl_actual", *(f"pnl_{t}" for t in TAYLOR_TERMS), "pnl_explained", "pnl_residual",
    "pnl_higher_order", "pnl_mark_gap", "pnl_new_trade", "pnl_expiry", "pnl_amendment", "pnl_total",
)
TOP_POSITIONS = 20
TOP_UNDERLYINGS = 30  # underlyings listed per book (largest residual first); the rest share one line
EXCEPTIONS_SHOWN = 50  # rows listed on a book page; the night's exceptions page lists them all
POSITION_TEXT: tuple[str, ...] = ("trade_id", "instrument_id", "underlying", "status", "flags", "limit_state")
POSITION_VALUES: tuple[str, ...] = ("quantity", "quantity_run_date", *TERM_COLUMNS)
_LIMIT_RANK = {"breach": 0, "watch": 1}
_ZONE_RANK = {"red": 0, "amber": 1}
_LIMIT_WORDS = {"breach": ("alert", "breach"), "watch": ("watch", "watch"), "within": ("ok", "within limit")}
_ZONE_WORDS = {"green": ("ok", "green zone: explained and actual P&L agree"),
               "amber": ("watch", "amber zone: agreement is weakening"),
               "red": ("alert", "red zone: explained and actual P&L disagree")}
_MAX_SLUG = 48
T = TypeVar("T")


class ReportError(ValueError):
    """The archive cannot give a report for the date asked; the message says why."""


@dataclass(frozen=True, slots=True)
class State:
    """A state shown as a coloured mark and always with its word: ``tone`` is ok/watch/alert/none."""

    code: str
    tone: str
    word: str


@dataclass(frozen=True, slots=True)
class BookSummary:
    """One row of the index."""

    name: str
    file_name: str
    total: float
    actual: float
    explained: float
    residual: float
    residual_share: float | None
    limit: State
    zone: State
    exceptions: int
    position_breaches: int


@dataclass(frozen=True, slots=True)
class FigureRow:
    """A labelled row of amounts in a fixed column order, plus small text cells."""

    label: str
    cells: tuple[str, ...]
    values: tuple[float | None, ...]


@dataclass(frozen=True, slots=True)
class MethodRow:
    """One factor of the two methods side by side."""

    key: str
    label: str
    taylor_terms: str
    taylor: float | None
    revaluation: float | None
    difference: float | None
    bar: charts.PairBar


@dataclass(frozen=True, slots=True)
class Quality:
    """The attribution-quality figures of a book on the night (None when not yet computed)."""

    zone: State
    nights: int
    provisional: bool
    spearman: float | None
    ks: float | None
    mean_ratio: float | None
    variance_ratio: float | None
    zone_60: State
    spearman_60: float | None
    ks_60: float | None
    early_warning: str


@dataclass(frozen=True, slots=True)
class ExceptionRow:
    """An input exception, with the books it touches (index page) or empty (book page)."""

    file: str
    key: str
    rule: str
    detail: str
    severity: str
    books: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class Conventions:
    """What the figures assume, in words for the page footer."""

    time_basis: str
    time_basis_words: str
    reporting_currency: str
    prior_as_of: dt.date | None
    calendar_days: int | None
    year_fraction: float | None
    next_business_day: dt.date
    revaluation_on: bool


@dataclass(frozen=True, slots=True)
class BookPage:
    """Everything one book page shows."""

    summary: BookSummary
    figures: Mapping[str, float | None]
    counts: Mapping[str, int]
    limit_text: str
    waterfall: charts.Waterfall
    methods: tuple[MethodRow, ...]
    method_total: MethodRow
    underlyings: tuple[FigureRow, ...]
    exposures: tuple[FigureRow, ...]
    positions: tuple[FigureRow, ...]
    unpriced: tuple[FigureRow, ...]
    history_lines: charts.LineChart | None
    history_residual: charts.LineChart | None
    quality: Quality | None
    exceptions: tuple[ExceptionRow, ...]
    exception_rules: tuple[tuple[str, str, int], ...]


def file_name_for(book: str) -> str:
    """A safe, unique, bounded file name for a book page: ``book-<slug>-<hash>.html``.

    The slug keeps ASCII letters, digits, ``-`` and ``_`` (anything else becomes ``-``), so no
    path separator or ``..`` survives; the hash of the full name keeps distinct names distinct.
    """
    slug = re.sub(r"[^A-Za-z0-9_-]+", "-", book).strip("-_")[:_MAX_SLUG] or "book"
    digest = hashlib.sha256(book.encode("utf-8")).hexdigest()[:12]
    return f"book-{slug}-{digest}.html"


def _frame(con: duckdb.DuckDBPyConnection, sql: str, params: list[object]) -> pd.DataFrame:
    return con.execute(sql, params).df()


def _columns(table: tuple[tuple[str, str], ...]) -> str:
    return ", ".join(name for name, _ in table)


@dataclass(frozen=True, slots=True)
class NightFrames:
    """The night's rows, one frame per query; grouped by book afterwards."""

    books: pd.DataFrame
    quality: pd.DataFrame
    underlyings: pd.DataFrame
    positions: pd.DataFrame
    unpriced: pd.DataFrame
    exceptions: pd.DataFrame
    links: pd.DataFrame
    history: pd.DataFrame
    run: pd.DataFrame


def load_night(con: duckdb.DuckDBPyConnection, as_of: dt.date, history_nights: int) -> NightFrames:
    """Read everything the night's pages show, with one query per kind of figure."""
    tables = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    missing = sorted({"position_pnl", "book_pnl", "input_exceptions", "book_quality", "runs"} - tables)
    if missing:
        raise ReportError(f"archive: table(s) {', '.join(missing)} missing; the report reads all five")
    books = _frame(con, f"SELECT {_columns(BOOK_PNL)} FROM book_pnl WHERE as_of = ? ORDER BY book", [as_of])
    prior = books["prior_as_of"].dropna().max() if len(books) else None
    prior_date = pd.Timestamp(prior).date() if prior is not None and not pd.isna(prior) else as_of
    terms = ", ".join(f"sum({c}) AS {c}" for c in (*TERM_COLUMNS, *EXPOSURE_COLUMNS))
    rest_terms = ", ".join("NULL" if c == "delta_units" else f"sum({c})" for c in (*TERM_COLUMNS, *EXPOSURE_COLUMNS))
    underlying_cols = ", ".join(("book", "underlying", "positions", "unpriced", *TERM_COLUMNS, *EXPOSURE_COLUMNS))
    row_cols = ", ".join((*POSITION_TEXT, "quantity", "quantity_run_date", *TERM_COLUMNS))
    exception_cols = "file, key, rule, detail, severity, book"
    return NightFrames(
        books=books,
        quality=_frame(con, f"SELECT {_columns(BOOK_QUALITY)} FROM book_quality WHERE as_of = ? ORDER BY book",
                       [as_of]),
        underlyings=_frame(con, f"""
            WITH u AS (SELECT book, underlying, count(*) AS positions,
                              count(*) FILTER (WHERE status = 'new_unpriced') AS unpriced, {terms}
                       FROM position_pnl WHERE as_of = ? GROUP BY book, underlying),
                 r AS (SELECT *, row_number() OVER (PARTITION BY book ORDER BY abs(pnl_residual) DESC,
                                                    abs(pnl_total) DESC, underlying) AS rank_in_book,
                              count(*) OVER (PARTITION BY book) AS underlyings_in_book FROM u)
            SELECT {underlying_cols} FROM (
                SELECT 0 AS rest, * EXCLUDE (rank_in_book, underlyings_in_book) FROM r WHERE rank_in_book <= ?
                UNION ALL  -- the rest of a book's underlyings in one line (delta units do not add up across them)
                SELECT 1, book, '(' || count(*) || ' other underlyings)', sum(positions)::BIGINT,
                       sum(unpriced)::BIGINT, {rest_terms}
                FROM r WHERE rank_in_book > ? GROUP BY book)
            ORDER BY book, rest, underlying""", [as_of, TOP_UNDERLYINGS, TOP_UNDERLYINGS]),
        positions=_frame(con, f"""
            SELECT book, {row_cols} FROM position_pnl WHERE as_of = ?
            QUALIFY row_number() OVER (PARTITION BY book ORDER BY abs(coalesce(pnl_residual, 0)) DESC,
                                       abs(coalesce(pnl_total, 0)) DESC, trade_id) <= ?
            ORDER BY book, abs(coalesce(pnl_residual, 0)) DESC, abs(coalesce(pnl_total, 0)) DESC, trade_id""",
                         [as_of, TOP_POSITIONS]),
        unpriced=_frame(con, f"""SELECT book, {row_cols} FROM position_pnl
                                 WHERE as_of = ? AND status = 'new_unpriced' ORDER BY book, trade_id""", [as_of]),
        exceptions=_frame(con, f"""SELECT row_number() OVER (ORDER BY severity, file, rule, key) AS exception_id,
                                   {exception_cols} FROM input_exceptions WHERE as_of = ?""", [as_of]),
        links=_frame(con, f"""
            WITH e AS (SELECT row_number() OVER (ORDER BY severity, file, rule, key) AS exception_id,
                              {exception_cols} FROM input_exceptions WHERE as_of = ?),
                 k AS (SELECT book, trade_id AS key FROM position_pnl WHERE as_of IN (?, ?)
                       UNION SELECT book, instrument_id FROM position_pnl WHERE as_of = ?
                       UNION SELECT book, underlying FROM position_pnl WHERE as_of = ?
                       UNION SELECT book, book FROM book_pnl WHERE as_of = ?)
            SELECT DISTINCT book, exception_id, file, key, rule, detail, severity FROM (
                SELECT k.book, e.exception_id, e.file, e.key, e.rule, e.detail, e.severity
                FROM e JOIN k ON e.key = k.key
                UNION ALL  -- a rejected position names its book even when it is in no archived row
                SELECT e.book, e.exception_id, e.file, e.key, e.rule, e.detail, e.severity FROM e
                WHERE e.book IS NOT NULL AND e.book IN (SELECT book FROM book_pnl WHERE as_of = ?))
            ORDER BY book, exception_id""",
                     [as_of, as_of, prior_date, as_of, as_of, as_of, as_of]),
        history=_frame(con, """
            SELECT book, as_of, pnl_actual, pnl_explained, pnl_residual FROM book_pnl
            WHERE as_of <= ? AND book IN (SELECT book FROM book_pnl WHERE as_of = ?)
            QUALIFY row_number() OVER (PARTITION BY book ORDER BY as_of DESC) <= ?
            ORDER BY book, as_of""", [as_of, as_of, max(int(history_nights), 1)]),
        run=_frame(con, f"""SELECT {_columns(RUNS)} FROM runs WHERE as_of = ?
                            ORDER BY finished_at DESC NULLS LAST, started_at DESC LIMIT 1""", [as_of]),
    )


def _by_book(frame: pd.DataFrame, rows: list[T]) -> dict[str, tuple[T, ...]]:
    """Split ``rows`` (one per frame row, frame sorted by book) into runs of the same book."""
    books = frame["book"].tolist() if len(frame) else []
    out: dict[str, tuple[T, ...]] = {}
    start = 0
    for i in range(1, len(books) + 1):
        if i == len(books) or books[i] != books[start]:
            out[str(books[start])] = tuple(rows[start:i])
            start = i
    return out


def _texts(frame: pd.DataFrame, column: str) -> list[str]:
    """A column as strings, NULL as the empty string."""
    if not len(frame):
        return []
    return frame[column].astype("string").fillna("").tolist()


def _floats(frame: pd.DataFrame, columns: tuple[str, ...]) -> list[tuple[float, ...]]:
    """Rows of ``columns`` as float tuples, NULL read as NaN (shown as missing)."""
    if not len(frame):
        return []
    return [tuple(r) for r in frame[list(columns)].to_numpy(dtype=float, na_value=float("nan")).tolist()]


def _text(value: object) -> str:
    return "" if value is None or (isinstance(value, float) and value != value) or value is pd.NA else str(value)


def _number(value: object) -> float | None:
    return None if value is None or pd.isna(value) else float(value)


def _state(words: Mapping[str, tuple[str, str]], code: object, absent: str) -> State:
    text = _text(code)
    tone, word = words.get(text, ("none", absent))
    return State(text, tone, word)


def _share(part: float | None, whole: float | None) -> float | None:
    if part is None or whole is None or abs(whole) < 1e-9:
        return None
    return part / abs(whole)


def _figure_rows(frame: pd.DataFrame, label: str, text: tuple[str, ...],
                 values: tuple[str, ...]) -> dict[str, tuple[FigureRow, ...]]:
    """FigureRows of a whole frame sorted by book, grouped by book."""
    labels = _texts(frame, label)
    cells = list(zip(*(_texts(frame, c) for c in text), strict=True)) if len(frame) else []
    numbers = _floats(frame, values)
    rows = [FigureRow(a, b, c) for a, b, c in zip(labels, cells, numbers, strict=True)]
    return _by_book(frame, rows)


def _quality(frame: pd.DataFrame) -> dict[str, Quality]:
    """The quality row of each book (one per book and night)."""
    out = {}
    for q in frame.to_dict("records"):
        out[_text(q["book"])] = Quality(
            zone=_state(_ZONE_WORDS, q["zone"], "not yet computed"), nights=int(_number(q["nights"]) or 0),
            provisional=True if pd.isna(q["provisional"]) else bool(q["provisional"]),
            spearman=_number(q["spearman"]), ks=_number(q["ks"]), mean_ratio=_number(q["mean_ratio"]),
            variance_ratio=_number(q["variance_ratio"]),
            zone_60=_state(_ZONE_WORDS, q["zone_60"], "not yet computed"),
            spearman_60=_number(q["spearman_60"]), ks_60=_number(q["ks_60"]), early_warning=_text(q["early_warning"]))
    return out


def _methods(f: Mapping[str, float | None]) -> tuple[tuple[MethodRow, ...], MethodRow]:
    def add(*keys: str) -> float | None:
        parts = [f[k] for k in keys]
        return None if any(p is None for p in parts) else sum(parts)  # type: ignore[misc]
    spec = (("spot", "Spot", "delta + gamma", add("pnl_delta", "pnl_gamma"), f["reval_spot"]),
            ("vol", "Volatility", "vega + volga", add("pnl_vega", "pnl_volga"), f["reval_vol"]),
            ("cross", "Cross spot-vol", "vanna", f["pnl_vanna"], 0.0 if f["reval_spot"] is not None else None),
            ("time", "Time", "theta", f["pnl_theta"], f["reval_time"]),
            ("rates", "Rates", "rho", f["pnl_rates"], f["reval_rates"]),
            ("dividend", "Dividend", "dividend", f["pnl_dividend"], f["reval_dividend"]))
    reval_total = add(*(f"reval_{k}" for k in ("spot", "vol", "time", "rates", "dividend")))
    bars = charts.pair_bars([(s[3], s[4]) for s in spec] + [(f["pnl_explained"], reval_total)])
    rows = tuple(MethodRow(key, label, terms, a, b, None if a is None or b is None else b - a, bar)
                 for (key, label, terms, a, b), bar in zip(spec, bars, strict=False))
    explained = f["pnl_explained"]
    total = MethodRow("total", "Sum of factors", "explained", explained, reval_total,
                      None if explained is None or reval_total is None else reval_total - explained, bars[-1])
    return rows, total


def _waterfall(f: Mapping[str, float | None], unpriced: int, currency: str) -> charts.Waterfall:
    labels = {"delta": "Delta", "gamma": "Gamma", "vega": "Vega", "volga": "Volga", "vanna": "Vanna",
              "theta": "Theta", "rates": "Rates", "dividend": "Dividend"}
    steps = [(f"pnl_{t}", labels[t], f[f"pnl_{t}"], "") for t in TAYLOR_TERMS]
    steps += [("pnl_new_trade", "New trades", f["pnl_new_trade"], f"{unpriced} unpriced, left out" if unpriced else ""),
              ("pnl_expiry", "Expiries", f["pnl_expiry"], ""),
              ("pnl_amendment", "Amendments", f["pnl_amendment"], ""),
              ("pnl_residual", "Residual", f["pnl_residual"], "")]
    return charts.waterfall(steps, ("pnl_total", f"Total P&L ({currency})", f["pnl_total"]), width=620.0)


History = tuple[charts.LineChart, charts.LineChart]


def _history(frame: pd.DataFrame) -> dict[str, History]:
    """Per book: actual vs explained lines, and the cumulative residual with each night's bar."""
    if not len(frame):
        return {}
    dates = pd.to_datetime(frame["as_of"]).dt.date.tolist()
    values = frame[["pnl_actual", "pnl_explained", "pnl_residual"]].fillna(0.0).to_numpy(dtype=float)
    spans = _by_book(frame, list(range(len(frame))))
    starts = np.array([rows[0] for rows in spans.values()], dtype=np.int64)
    residual = values[:, 2]
    running = np.cumsum(residual)
    cumulative = running - np.repeat(running[starts] - residual[starts], np.diff(np.append(starts, len(frame))))
    lines = charts.line_charts(dates, starts, [("Actual", "line-actual", values[:, 0]),
                                               ("Explained", "line-explained", values[:, 1])])
    sums = charts.line_charts(dates, starts, [("Cumulative residual", "line-cumulative", cumulative)], bars=residual)
    return dict(zip(spans, zip(lines, sums, strict=True), strict=True))


def _limit_text(f: Mapping[str, float | None], state: str, watch_fraction: float) -> str:
    residual = charts.format_amount(abs(f["pnl_residual"] or 0.0))
    limit = charts.format_amount(f["residual_limit"])
    if state == "breach":
        return f"Breach: the absolute residual {residual} is above tonight's limit of {limit}."
    if state == "watch":
        return (f"Watch: the absolute residual {residual} has passed {watch_fraction:.0%} "
                f"of tonight's limit of {limit}.")
    if state == "within":
        return f"Within limit: the absolute residual {residual} against tonight's limit of {limit}."
    return "No limit state recorded for this book tonight."


def _exceptions(frame: pd.DataFrame) -> dict[str, tuple[ExceptionRow, ...]]:
    """The exceptions touching each book (frame: the book-to-exception links, sorted by book)."""
    cols = [_texts(frame, c) for c in ("file", "key", "rule", "detail", "severity")] if len(frame) else []
    rows = [ExceptionRow(*values, books=()) for values in zip(*cols, strict=True)]
    return _by_book(frame, rows)


def _rule_counts(rows: tuple[ExceptionRow, ...]) -> tuple[tuple[str, str, int], ...]:
    """(severity, rule, rows) of a book's exceptions, rejected first."""
    counts: dict[tuple[str, str], int] = {}
    for row in rows:
        counts[(row.severity, row.rule)] = counts.get((row.severity, row.rule), 0) + 1
    return tuple((severity, rule, n) for (severity, rule), n in sorted(counts.items()))


_COUNT_COLUMNS = ("positions", "carried", "closed", "new", "new_unpriced", "expired", "settled", "rejected", "warnings",
                  "position_breaches")


def book_pages(frames: NightFrames, config: JobConfig) -> list[BookPage]:
    """One page per book row of the night, in the index's order (most attention first)."""
    quality = _quality(frames.quality)
    exceptions = _exceptions(frames.links)
    history = _history(frames.history)
    underlyings = _figure_rows(frames.underlyings, "underlying", ("positions", "unpriced"), TERM_COLUMNS)
    exposures = _figure_rows(frames.underlyings, "underlying", ("positions",), EXPOSURE_COLUMNS)
    positions = _figure_rows(frames.positions, "trade_id", POSITION_TEXT[1:], POSITION_VALUES)
    unpriced = _figure_rows(frames.unpriced, "trade_id", POSITION_TEXT[1:], POSITION_VALUES)
    numeric = [c for c, kind in BOOK_PNL if kind == "DOUBLE"]
    pages = []
    for record in frames.books.to_dict("records"):
        name = _text(record["book"])
        figures = {c: _number(record[c]) for c in numeric}
        counts = {c: int(_number(record[c]) or 0) for c in _COUNT_COLUMNS}
        limit_code = _text(record["limit_state"])
        q = quality.get(name)
        summary = BookSummary(
            name=name, file_name=file_name_for(name), total=figures["pnl_total"] or 0.0,
            actual=figures["pnl_actual"] or 0.0, explained=figures["pnl_explained"] or 0.0,
            residual=figures["pnl_residual"] or 0.0,
            residual_share=_share(figures["pnl_residual"], figures["pnl_actual"]),
            limit=_state(_LIMIT_WORDS, limit_code, "not recorded"),
            zone=q.zone if q else State("", "none", "not yet computed"),
            exceptions=len(exceptions.get(name, ())), position_breaches=counts["position_breaches"])
        methods, method_total = _methods(figures)
        lines, cumulative = history.get(name, (None, None))
        pages.append(BookPage(
            summary=summary, figures=figures, counts=counts,
            limit_text=_limit_text(figures, limit_code, config.limits_for(name).watch_fraction),
            waterfall=_waterfall(figures, counts["new_unpriced"], config.reporting_currency),
            methods=methods, method_total=method_total,
            underlyings=underlyings.get(name, ()), exposures=exposures.get(name, ()),
            positions=positions.get(name, ()), unpriced=unpriced.get(name, ()),
            history_lines=lines, history_residual=cumulative, quality=q, exceptions=exceptions.get(name, ()),
            exception_rules=_rule_counts(exceptions.get(name, ()))))
    pages.sort(key=_attention)
    return pages


def _attention(page: BookPage) -> tuple[int, int, float, str]:
    """Breach first, then watch, then red and amber zones, then the largest absolute residual."""
    s = page.summary
    return (_LIMIT_RANK.get(s.limit.code, 2), _ZONE_RANK.get(s.zone.code, 2), -abs(s.residual), s.name)


def _conventions(frames: NightFrames, as_of: dt.date, config: JobConfig) -> Conventions:
    """The run's own time basis when its record names one, else the job's; revaluation as archived."""
    basis_name = config.time_basis
    if len(frames.run):
        try:
            settings = json.loads(_text(frames.run.iloc[0]["job_settings"]) or "{}")
        except json.JSONDecodeError:
            settings = {}
        if isinstance(settings, dict) and settings.get("time_basis"):
            basis_name = str(settings["time_basis"])
    basis = TimeBasis(basis_name, config.holidays)
    priors = frames.books["prior_as_of"].dropna() if len(frames.books) else pd.Series([], dtype=object)
    prior = pd.Timestamp(priors.max()).date() if len(priors) else None
    words = ("business days between the two dates (weekends and the job's holidays left out) / 252"
             if basis_name == "BUS/252" else "calendar days between the two dates / 365")
    return Conventions(
        time_basis=basis_name, time_basis_words=words, reporting_currency=config.reporting_currency,
        prior_as_of=prior, calendar_days=(as_of - prior).days if prior else None,
        year_fraction=float(basis.year_fraction(prior, as_of)[0]) if prior else None,
        next_business_day=basis.next_business_day(as_of),
        revaluation_on=bool(frames.books["reval_spot"].notna().any()) if len(frames.books) else config.revaluation)


@dataclass(frozen=True, slots=True)
class NightView:
    """Everything the index and the exceptions page show."""

    as_of: dt.date
    conventions: Conventions
    books: tuple[BookSummary, ...]
    totals: Mapping[str, float]
    run: Mapping[str, str]
    exceptions: tuple[ExceptionRow, ...]
    severity_counts: tuple[tuple[str, int], ...]
    rule_counts: tuple[tuple[str, str, int], ...]


def _run_text(value: object) -> str:
    """A run-record value as text; timestamps to the second."""
    if isinstance(value, dt.datetime) and not pd.isna(value):
        return value.strftime("%Y-%m-%d %H:%M:%S")
    return _text(value)


def night_view(frames: NightFrames, pages: list[BookPage], as_of: dt.date, conventions: Conventions) -> NightView:
    """The index's rows (pages already in attention order), the night's totals and every exception."""
    links = frames.links
    touched: dict[int, tuple[str, ...]] = {}
    if len(links):
        touched = {int(k): tuple(str(b) for b in g["book"]) for k, g in links.groupby("exception_id", sort=False)}
    ex = frames.exceptions
    rows = tuple(ExceptionRow(_text(r["file"]), _text(r["key"]), _text(r["rule"]), _text(r["detail"]),
                              _text(r["severity"]), touched.get(int(r["exception_id"]), ()))
                 for r in ex.to_dict("records"))
    severity = ex["severity"].fillna("").value_counts().sort_index() if len(ex) else pd.Series(dtype=int)
    rules = (ex.fillna({"file": "", "rule": ""}).groupby(["file", "rule"]).size().sort_index()
             if len(ex) else pd.Series(dtype=int))
    books = frames.books
    totals = {c: float(books[c].fillna(0.0).sum()) if len(books) else 0.0
              for c in ("pnl_total", "pnl_actual", "pnl_explained", "pnl_residual")}
    run = {c: _run_text(v) for c, v in frames.run.iloc[0].items()} if len(frames.run) else {}
    return NightView(as_of, conventions, tuple(p.summary for p in pages), totals, run, rows,
                     tuple((str(k), int(v)) for k, v in severity.items()),
                     tuple((str(k[0]), str(k[1]), int(v)) for k, v in rules.items()))


_NEW_TRADE_AT = TERM_COLUMNS.index("pnl_new_trade")


def _cells(texts: Sequence[str]) -> str:
    return "<td>" + "</td><td>".join(texts) + "</td>" if texts else ""


def amount_cells(values: Sequence[float | None]) -> markupsafe.Markup:
    """Table cells of formatted amounts, one ``<td>`` each, in one call (the pages' hot loop).

    The cell text comes from :func:`charts.format_amounts` only (digits, separators, a minus
    sign or the missing-value dash), so it holds nothing to escape.
    """
    return markupsafe.Markup(_cells(charts.format_amounts(values)))


def position_cells(values: Sequence[float | None]) -> markupsafe.Markup:
    """Cells of a position row (POSITION_VALUES): two quantities, then amounts; a NULL day-one P&L is unpriced."""
    amounts = charts.format_amounts(values[2:])
    if charts.is_missing(values[2 + _NEW_TRADE_AT]):
        amounts[_NEW_TRADE_AT] = "unpriced"
    return markupsafe.Markup(_cells([_format_quantity(v) for v in values[:2]] + amounts))


def position_text_cells(row: FigureRow) -> markupsafe.Markup:
    """The text cells of a position row: trade, instrument, underlying, and status with limit word and flags.

    Every text is escaped here (markupsafe.escape), as the template would; one call per row keeps the
    pages' hot loop short.
    """
    esc = markupsafe.escape
    instrument, underlying, status, flags, limit = row.cells
    limit_word = f" &middot; <strong>{esc(limit)}</strong>" if limit and limit != "within" else ""
    flag_line = f'<br><span class="sub small">{esc(flags.replace(",", ", "))}</span>' if flags else ""
    return markupsafe.Markup(f'<td class="t">{esc(row.label)}</td><td class="t">{esc(instrument)}</td>'
                             f'<td class="t">{esc(underlying)}</td>'
                             f'<td class="t wrap">{esc(status)}{limit_word}{flag_line}</td>')


def _format_quantity(value: float | None) -> str:
    if charts.is_missing(value):
        return charts.MISSING
    return charts.format_amount(value, 0 if float(value).is_integer() else 2)  # type: ignore[arg-type]


def make_environment() -> jinja2.Environment:
    """The report's Jinja2 environment: package templates, autoescape on for every template."""
    env = jinja2.Environment(loader=jinja2.PackageLoader("attribution", "templates"), autoescape=True,
                             undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True,
                             auto_reload=False)
    env.filters["amount"] = charts.format_amount
    env.filters["percent"] = charts.format_percent
    env.filters["ratio"] = lambda v: charts.format_amount(v, 3)
    env.filters["raw"] = lambda v: "" if charts.is_missing(v) else repr(float(v))
    env.filters["quantity"] = _format_quantity
    env.filters["amount_cells"] = amount_cells
    env.filters["position_cells"] = position_cells
    env.filters["position_text_cells"] = position_text_cells
    env.filters["file_name"] = lambda path: str(path).replace("\\", "/").rsplit("/", 1)[-1]
    env.globals["missing"] = charts.is_missing
    env.globals["exceptions_shown"] = EXCEPTIONS_SHOWN
    return env


def _remove_leftovers(target: Path) -> None:
    """Remove the staging and set-aside folders of ``target``'s date that an interrupted render left.

    Safe because one date is rendered by one run at a time (the engine renders under the archive lock).
    """
    for pattern in (f".{target.name}.tmp-*", f".{target.name}.old-*"):
        for stale in target.parent.glob(pattern):
            if stale.is_dir() and not stale.is_symlink():
                shutil.rmtree(stale, ignore_errors=True)


def _write_atomically(target: Path, files: Mapping[str, str]) -> None:
    """Write ``files`` into a temporary folder beside ``target``, then move it into place.

    Leftovers of an earlier interrupted render of the same date are removed first.
    """
    target.parent.mkdir(parents=True, exist_ok=True)
    # Runs on different archives may share a reports folder: they take turns here (an OS lock,
    # released by the kernel however a run ends), so one never cleans up the other's staging.
    # The lock is on the folder itself, so it leaves no file behind.
    folder = os.open(target.parent, os.O_RDONLY | os.O_DIRECTORY)
    try:
        fcntl.flock(folder, fcntl.LOCK_EX)
        _stage_and_move(target, files)
    finally:
        os.close(folder)


def _stage_and_move(target: Path, files: Mapping[str, str]) -> None:
    _remove_leftovers(target)
    staging = target.parent / f".{target.name}.tmp-{secrets.token_hex(6)}"
    staging.mkdir()  # the usual permissions (umask), unlike a private mkdtemp folder
    old: Path | None = None
    try:
        for name, text in files.items():
            path = (staging / name).resolve()
            if path.parent != staging.resolve():
                raise ReportError(f"report: file name {name!r} would leave the report folder")
            path.write_text(text, encoding="utf-8")
        if target.exists():
            old = target.parent / f".{target.name}.old-{secrets.token_hex(6)}"
            target.rename(old)
        staging.rename(target)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        if old is not None and old.exists() and not target.exists():
            old.rename(target)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def render_night(con: duckdb.DuckDBPyConnection, as_of: dt.date, reports_dir: Path, config: JobConfig) -> Path:
    """Write ``<reports_dir>/<as_of>/index.html``, ``exceptions.html`` and one page per book; return the index."""
    frames = load_night(con, as_of, config.history_nights)
    if not len(frames.books) and not len(frames.exceptions) and not len(frames.run):
        raise ReportError(f"archive: nothing archived for {as_of.isoformat()} (no run, no book, no exception)")
    pages = book_pages(frames, config)
    conventions = _conventions(frames, as_of, config)
    night = night_view(frames, pages, as_of, conventions)
    env = make_environment()
    footer = markupsafe.Markup(env.get_template("footer.html").render(night=night))  # the same on every page
    book_template = env.get_template("book.html")
    files = {"index.html": env.get_template("index.html").render(night=night, footer=footer),
             "exceptions.html": env.get_template("exceptions.html").render(night=night, footer=footer)}
    for page in pages:
        files[page.summary.file_name] = book_template.render(page=page, night=night, footer=footer)
    target = Path(reports_dir) / as_of.isoformat()
    _write_atomically(target, files)
    return target / "index.html"
