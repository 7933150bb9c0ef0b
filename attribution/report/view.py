"""Building the pages' views from the night's frames: grouping by book, states in words, charts laid out."""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from typing import TypeVar

import markupsafe
import numpy as np
import pandas as pd

from attribution.report import charts, tables
from attribution.report.pages import (
    NO_ROWS,
    BookPage,
    BookSummary,
    Conventions,
    DeskSummary,
    ExceptionRow,
    FigureRow,
    MethodRow,
    NightView,
    Quality,
    Rows,
    State,
    file_name_for,
)
from attribution.report.queries import (
    CURRENCY_VALUES,
    EXPOSURE_CHANGE_COLUMNS,
    EXPOSURE_COLUMNS,
    HEDGING_VALUES,
    POSITION_TEXT,
    POSITION_VALUES,
    STRATEGY_COLUMNS,
    TERM_COLUMNS,
    VOL_PART_COLUMNS,
    NightFrames,
)
from attribution.report.settings import NightSettings
from attribution.schema import BOOK_PNL, REVAL_COLUMNS, TAYLOR_TERMS, UNASSIGNED_DESK
from attribution.timebasis import TimeBasis

_LIMIT_RANK = {"breach": 0, "watch": 1}
_ZONE_RANK = {"red": 0, "amber": 1}
_LIMIT_WORDS = {"breach": ("alert", "breach"), "watch": ("watch", "watch"), "within": ("ok", "within limit")}
_ZONE_WORDS = {"green": ("ok", "green zone: explained and actual P&L agree"),
               "amber": ("watch", "amber zone: agreement is weakening"),
               "red": ("alert", "red zone: explained and actual P&L disagree")}
T = TypeVar("T")
NO_STRATEGY = "(no strategy label)"
# The rows of the night / month-to-date / year-to-date tables: (column, label).
TO_DATE_ROWS: tuple[tuple[str, str], ...] = (
    ("pnl_total", "Total P&L"), ("pnl_actual", "Actual, positions held overnight"),
    *((f"pnl_{t}", t.capitalize()) for t in TAYLOR_TERMS),
    ("pnl_explained", "Explained"), ("pnl_residual", "Residual"),
    ("pnl_higher_order", "of which expansion error"), ("pnl_mark_gap", "of which mark/model gap"),
    ("pnl_new_trade", "New trades"), ("pnl_expiry", "Expiries"), ("pnl_amendment", "Amendments"),
    ("pnl_fx_translation", "FX translation"), ("pnl_cash", "Cash flows"),
    ("official_pnl", "Official P&L"), ("official_break", "Official P&L break (official - total)"),
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
    cells = list(zip(*(_texts(frame, c) for c in text), strict=True)) if text else [()] * len(frame)
    numbers = _floats(frame, values)
    rows = [FigureRow(a, b, c) for a, b, c in zip(labels, cells, numbers, strict=True)]
    return _by_book(frame, rows)


MEAN_RATIO_GUIDE, VARIANCE_RATIO_GUIDE = 0.10, 0.20  # BCBS 352 (2016): |mean| <= 10 %, variance <= 20 %


def _zone(q: Mapping[str, object]) -> State:
    """The zone in words; a green zone whose BCBS 352 ratios are outside their guides says so in the same line."""
    state = _state(_ZONE_WORDS, q["zone"], "not yet computed")
    mean, variance = _number(q["mean_ratio"]), _number(q["variance_ratio"])
    outside = []
    if mean is not None and abs(mean) > MEAN_RATIO_GUIDE:
        outside.append(f"mean ratio {mean:.0%} (guide within \u00b1{MEAN_RATIO_GUIDE:.0%})")
    if variance is not None and variance > VARIANCE_RATIO_GUIDE:
        outside.append(f"variance ratio {variance:.0%} (guide at most {VARIANCE_RATIO_GUIDE:.0%})")
    if state.code == "green" and outside:
        return State(state.code, "watch", f"{state.word}, but the BCBS 352 ratios are outside their guides: "
                                          + "; ".join(outside))
    return state


def _quality(frame: pd.DataFrame) -> dict[str, Quality]:
    """The quality row of each book (one per book and night)."""
    out = {}
    for q in frame.to_dict("records"):
        out[_text(q["book"])] = Quality(
            zone=_zone(q), nights=int(_number(q["nights"]) or 0),
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
    smile = bool(f.get("pnl_smile_delta"))  # sticky moneyness: the spot-implied vol move is spot P&L
    spot_terms = ("pnl_delta", "pnl_gamma", "pnl_smile_delta") if smile else ("pnl_delta", "pnl_gamma")
    spec = (("spot", "Spot", "delta + gamma + smile delta" if smile else "delta + gamma", add(*spot_terms),
             f["reval_spot"]),
            ("vol", "Volatility", "vega + volga", add("pnl_vega", "pnl_volga"), f["reval_vol"]),
            ("cross", "Cross spot-vol", "vanna", f["pnl_vanna"], 0.0 if f["reval_spot"] is not None else None),
            ("time", "Time", "theta", f["pnl_theta"], f["reval_time"]),
            ("rates", "Rates", "rho", f["pnl_rates"], f["reval_rates"]),
            ("dividend", "Dividend / foreign rate", "dividend (FX: foreign rate)", f["pnl_dividend"],
             f["reval_dividend"]))
    reval_total = add(*REVAL_COLUMNS)
    bars = charts.pair_bars([(s[3], s[4]) for s in spec] + [(f["pnl_explained"], reval_total)])
    rows = tuple(MethodRow(key, label, terms, a, b, None if a is None or b is None else b - a, bar)
                 for (key, label, terms, a, b), bar in zip(spec, bars, strict=False))
    explained = f["pnl_explained"]
    total = MethodRow("total", "Sum of factors", "explained", explained, reval_total,
                      None if explained is None or reval_total is None else reval_total - explained, bars[-1])
    return rows, total


def _waterfall(f: Mapping[str, float | None], unpriced: int, currency: str) -> charts.Waterfall:
    labels = {"delta": "Delta", "gamma": "Gamma", "vega": "Vega", "volga": "Volga", "vanna": "Vanna",
              "theta": "Theta", "rates": "Rates", "dividend": "Dividend / foreign rate (FX)"}
    steps = [(f"pnl_{t}", labels[t], f[f"pnl_{t}"], "") for t in TAYLOR_TERMS]
    if f.get("pnl_smile_delta"):  # sticky moneyness: a ninth explained line
        steps.insert(1, ("pnl_smile_delta", "Smile delta", f["pnl_smile_delta"], "spot-implied vol move"))
    steps += [("pnl_new_trade", "New trades", f["pnl_new_trade"], f"{unpriced} unpriced, left out" if unpriced else ""),
              ("pnl_expiry", "Expiries", f["pnl_expiry"], ""),
              ("pnl_amendment", "Amendments", f["pnl_amendment"], ""),
              ("pnl_fx_translation", "FX translation", f["pnl_fx_translation"], "prior value at the new FX rate"),
              ("pnl_cash", "Cash flows", f["pnl_cash"], ""),
              ("pnl_residual", "Residual", f["pnl_residual"], "")]
    return charts.waterfall(steps, ("pnl_total", f"Total P&L ({currency})", f["pnl_total"]), width=620.0)


def _hedging(frame: pd.DataFrame, currency: str) -> tuple[dict[str, Rows], dict[str, charts.Waterfall]]:
    """Per book: its hedging rows (options, hedges, book per underlying) and the options / hedges / cash
    waterfall to the book's total (the query's sums over every underlying, whatever is listed)."""
    if not len(frame):
        return {}, {}
    rows = tables.hedging_rows(frame, HEDGING_VALUES)
    sums = frame.drop_duplicates("book")[["book", "book_options_pnl", "book_hedges_pnl", "book_cash_pnl"]]
    charts_by_book = {}
    for book, options, hedges, cash in sums.itertuples(index=False):
        steps = [("hedging-options", "Options", float(options), ""),  # keys unlike the night's waterfall's
                 ("hedging-hedges", "Hedges", float(hedges), "underlying, futures, forwards"),
                 ("hedging-cash", "Cash flows", float(cash), "")]
        charts_by_book[str(book)] = charts.waterfall(
            steps, ("hedging-total", f"Total P&L ({currency})", float(options + hedges + cash)), width=620.0)
    return rows, charts_by_book


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


def _vol_parts(frame: pd.DataFrame, buckets: tuple[tuple[float, str], ...]) -> dict[str, Rows]:
    """Per book: the vol P&L rows by expiry bucket, then their total row."""
    if not len(frame):
        return {}
    frame = frame.assign(label=[buckets[int(b)][1] for b in frame["bucket"]])
    rows = tables.labelled_amounts(frame, "label", "positions", VOL_PART_COLUMNS)
    totals = frame.groupby("book", sort=True)[["positions", *VOL_PART_COLUMNS]].sum(min_count=1)
    sums = tables.cells(tables.floats(totals, VOL_PART_COLUMNS))
    out = {}
    for book, positions, amounts in zip(totals.index.tolist(), totals["positions"].tolist(), sums, strict=True):
        book_rows = rows[str(book)]
        total = (f'<tr class="sum" id="vol-parts-total"><td class="t">All expiries</td><td>{int(positions)}</td>'
                 f"{amounts}</tr>\n")
        out[str(book)] = Rows(book_rows.html + markupsafe.Markup(total), book_rows.count)
    return out


_COUNT_COLUMNS = ("positions", "carried", "closed", "new", "new_unpriced", "expired", "settled", "rejected", "warnings",
                  "position_breaches", "rejected_unvalued")


def _empty_if_none(frame: pd.DataFrame | None) -> pd.DataFrame:
    return frame if frame is not None else pd.DataFrame()


def _records(frame: pd.DataFrame | None, key: str) -> dict[str, dict[str, object]]:
    """Rows of ``frame`` by their ``key`` column."""
    if frame is None or not len(frame):
        return {}
    return {_text(r[key]): r for r in frame.to_dict("records")}


def _labelled(frame: pd.DataFrame | None) -> pd.DataFrame:
    """The strategy rows with a word for positions without a label."""
    if frame is None or not len(frame):
        return pd.DataFrame()
    return frame.assign(strategy=frame["strategy"].astype(object).where(frame["strategy"].notna(), NO_STRATEGY))


def _previous_night(frame: pd.DataFrame | None) -> dt.date | None:
    if frame is None or not len(frame) or frame["previous_as_of"].isna().all():
        return None
    return pd.Timestamp(frame["previous_as_of"].dropna().iloc[0]).date()


def _book_to_date(books: pd.DataFrame, to_date: pd.DataFrame | None) -> dict[str, Rows]:
    """Per book: each term of TO_DATE_ROWS for the night (the book's row), month and year to date."""
    if not len(books):
        return {}
    names = [_text(b) for b in books["book"].tolist()]
    periods = pd.DataFrame(index=names)
    if to_date is not None and len(to_date):
        keyed = to_date.assign(book=[_text(b) for b in to_date["book"].tolist()])
        periods = keyed.drop_duplicates("book", keep="last").set_index("book").reindex(names)
    nan = np.full(len(names), np.nan)
    values = np.stack([np.column_stack([
        books[c].to_numpy(dtype=float, na_value=np.nan) if c in books.columns else nan,
        *(periods[f"{c}_{p}"].to_numpy(dtype=float, na_value=np.nan) if f"{c}_{p}" in periods.columns else nan
          for p in ("mtd", "ytd"))]) for c, _ in TO_DATE_ROWS], axis=1)
    return tables.to_date_rows(names, TO_DATE_ROWS, values)


def _to_date_rows(night: Mapping[str, float | None], to_date: Mapping[str, object]) -> tuple[FigureRow, ...]:
    """(night, month to date, year to date) of each term of TO_DATE_ROWS."""
    return tuple(FigureRow(label, (column,), (night.get(column), _number(to_date.get(f"{column}_mtd")),
                                              _number(to_date.get(f"{column}_ytd"))))
                 for column, label in TO_DATE_ROWS)


def book_pages(frames: NightFrames, settings: NightSettings) -> list[BookPage]:
    """One page per book row of the night, in the index's order (most attention first)."""
    quality = _quality(frames.quality)
    exceptions = _exceptions(frames.links)
    history = _history(frames.history)
    underlyings = tables.underlying_rows(frames.underlyings, TERM_COLUMNS)
    exposures = tables.labelled_amounts(frames.underlyings, "underlying", None, EXPOSURE_COLUMNS)
    positions = tables.position_rows(frames.positions, POSITION_TEXT[1:], POSITION_VALUES)
    unpriced = _figure_rows(frames.unpriced, "trade_id", POSITION_TEXT[1:], POSITION_VALUES)
    vol_parts = _vol_parts(frames.vol_parts, frames.buckets)
    to_date = _records(frames.to_date_books, "book")
    strategies = tables.labelled_amounts(_labelled(frames.strategies), "strategy", "positions", STRATEGY_COLUMNS)
    changes = tables.labelled_amounts(_empty_if_none(frames.exposure_changes), "underlying", None,
                                      EXPOSURE_CHANGE_COLUMNS)
    book_to_date = _book_to_date(frames.books, frames.to_date_books)
    previous = _previous_night(frames.exposure_changes)
    schedule = _figure_rows(frames.dividend_schedule, "underlying",
                            ("currency", "next_ex_date", "dividends", "last_ex_date"),
                            ("next_amount", "next_pv", "schedule_pv"))
    ex_dates = _figure_rows(frames.ex_dates, "underlying", ("currency", "positions"),
                            ("amount", "pnl_delta", "pnl_dividend", "cash_dividends", "pnl_residual", "pnl_total"))
    hedging, hedge_waterfalls = _hedging(frames.hedging, settings.reporting_currency)
    currencies = tables.currency_rows(frames.currencies, CURRENCY_VALUES)
    numeric = [c for c, kind in BOOK_PNL if kind == "DOUBLE"]
    # the books' amounts as one float block (NULL as NaN, shown as None): no per-value conversion
    amounts = frames.books[numeric].to_numpy(dtype=float, na_value=np.nan).tolist() if len(frames.books) else []
    pages = []
    for record, row in zip(frames.books.to_dict("records"), amounts, strict=True):
        name = _text(record["book"])
        figures = {c: None if v != v else v for c, v in zip(numeric, row, strict=True)}
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
            exceptions=len(exceptions.get(name, ())), position_breaches=counts["position_breaches"],
            desk=_text(record["desk"]) or UNASSIGNED_DESK, desk_file=file_name_for(_text(record["desk"]) or
                                                                                  UNASSIGNED_DESK, "desk"),
            total_mtd=_number(to_date.get(name, {}).get("pnl_total_mtd")),
            total_ytd=_number(to_date.get(name, {}).get("pnl_total_ytd")),
            residual_mtd=_number(to_date.get(name, {}).get("pnl_residual_mtd")),
            residual_ytd=_number(to_date.get(name, {}).get("pnl_residual_ytd")),
            official_break=figures.get("official_break"))
        methods, method_total = _methods(figures)
        lines, cumulative = history.get(name, (None, None))
        pages.append(BookPage(
            summary=summary, figures=figures, counts=counts,
            limit_text=_limit_text(figures, limit_code, settings.watch_fraction_for(name)),
            waterfall=_waterfall(figures, counts["new_unpriced"], settings.reporting_currency),
            methods=methods, method_total=method_total,
            underlyings=underlyings.get(name, NO_ROWS), exposures=exposures.get(name, NO_ROWS),
            positions=positions.get(name, NO_ROWS), unpriced=unpriced.get(name, ()),
            history_lines=lines, history_residual=cumulative, quality=q, exceptions=exceptions.get(name, ()),
            exception_rules=_rule_counts(exceptions.get(name, ())),
            vol_parts=vol_parts.get(name, NO_ROWS),
            dividend_schedule=schedule.get(name, ()), ex_dates=ex_dates.get(name, ()),
            hedging=hedging.get(name, NO_ROWS), hedge_waterfall=hedge_waterfalls.get(name),
            currencies=currencies.get(name, NO_ROWS), to_date=book_to_date.get(name, NO_ROWS),
            breaches_to_date=(int(_number(to_date.get(name, {}).get("breaches_mtd")) or 0),
                              int(_number(to_date.get(name, {}).get("breaches_ytd")) or 0)),
            strategies=strategies.get(name, NO_ROWS), exposure_changes=changes.get(name, NO_ROWS),
            previous_as_of=previous))
    pages.sort(key=_attention)
    return pages


def _attention(page: BookPage) -> tuple[int, int, float, str]:
    """Breach first, then watch, then red and amber zones, then the largest absolute residual."""
    s = page.summary
    return (_LIMIT_RANK.get(s.limit.code, 2), _ZONE_RANK.get(s.zone.code, 2), -abs(s.residual), s.name)


def conventions(frames: NightFrames, as_of: dt.date, settings: NightSettings) -> Conventions:
    """The night's time basis, holidays and currency as its run record archived them; revaluation as archived."""
    basis_name = settings.time_basis
    basis = TimeBasis(basis_name, settings.holidays)
    priors = frames.books["prior_as_of"].dropna() if len(frames.books) else pd.Series([], dtype=object)
    prior = pd.Timestamp(priors.max()).date() if len(priors) else None
    words = ("business days between the two dates (weekends and the job's holidays left out) / 252"
             if basis_name == "BUS/252" else "calendar days between the two dates / 365")
    return Conventions(
        time_basis=basis_name, time_basis_words=words, reporting_currency=settings.reporting_currency,
        prior_as_of=prior, calendar_days=(as_of - prior).days if prior else None,
        year_fraction=float(basis.year_fraction(prior, as_of)[0]) if prior else None,
        next_business_day=basis.next_business_day(as_of),
        revaluation_on=bool(frames.books["reval_spot"].notna().any()) if len(frames.books) else settings.revaluation)



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
                     tuple((str(k[0]), str(k[1]), int(v)) for k, v in rules.items()),
                     desks=desk_summaries(frames, pages))


def _worst(states: list[State], rank: Mapping[str, int], absent: State) -> State:
    known = [s for s in states if s.code]
    return min(known, key=lambda s: rank.get(s.code, 2)) if known else absent


def _sum(values: list[float | None]) -> float | None:
    present = [v for v in values if v is not None]
    return sum(present) if present else None


def desk_summaries(frames: NightFrames, pages: list[BookPage]) -> tuple[DeskSummary, ...]:
    """One summary per desk of the night's books (pages in attention order); desks needing attention first,
    ``(unassigned)`` last among equals."""
    to_date = _records(frames.to_date_desks, "desk")
    by_desk: dict[str, list[BookPage]] = {}
    for page in pages:
        by_desk.setdefault(page.summary.desk or UNASSIGNED_DESK, []).append(page)
    desks = []
    for name, members in by_desk.items():
        books = [p.summary for p in members]
        night = {c: _sum([p.figures.get(c) for p in members]) for c, _ in TO_DATE_ROWS}
        row = to_date.get(name, {})
        actual = sum(b.actual for b in books)
        residual = sum(b.residual for b in books)
        desks.append(DeskSummary(
            name=name, file_name=file_name_for(name, "desk"), books=tuple(books),
            total=sum(b.total for b in books), actual=actual, explained=sum(b.explained for b in books),
            residual=residual, residual_share=_share(residual, actual),
            limit=_worst([b.limit for b in books], _LIMIT_RANK, State("", "none", "not recorded")),
            zone=_worst([b.zone for b in books], _ZONE_RANK, State("", "none", "not yet computed")),
            breaches=sum(b.limit.code == "breach" for b in books), watches=sum(b.limit.code == "watch" for b in books),
            exceptions=sum(b.exceptions for b in books), position_breaches=sum(b.position_breaches for b in books),
            total_mtd=_number(row.get("pnl_total_mtd")), total_ytd=_number(row.get("pnl_total_ytd")),
            residual_mtd=_number(row.get("pnl_residual_mtd")), residual_ytd=_number(row.get("pnl_residual_ytd")),
            official_break=_sum([b.official_break for b in books]), to_date=_to_date_rows(night, row)))
    desks.sort(key=lambda d: (_LIMIT_RANK.get(d.limit.code, 2), _ZONE_RANK.get(d.zone.code, 2),
                              d.name == UNASSIGNED_DESK, d.name))
    return tuple(desks)
