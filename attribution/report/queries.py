"""The report's reads from the archive: one set-based query per kind of figure, values as parameters."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

import duckdb
import pandas as pd

from attribution.config import DEFAULT_EXPIRY_BUCKETS, tenor_years
from attribution.periods import to_date
from attribution.schema import BOOK_PNL, BOOK_QUALITY, EXPOSURE_COLUMNS, RUNS, TAYLOR_TERMS

TERM_COLUMNS: tuple[str, ...] = (
    "pnl_actual", *(f"pnl_{t}" for t in TAYLOR_TERMS), "pnl_explained", "pnl_residual",
    "pnl_higher_order", "pnl_mark_gap", "pnl_new_trade", "pnl_expiry", "pnl_amendment", "pnl_fx_translation",
    "pnl_total",
)
CURRENCY_VALUES: tuple[str, ...] = ("value_local", "fx_rate", "value_reporting", "fx_move_1pct", "pnl_fx_translation")
TOP_POSITIONS = 20
TOP_UNDERLYINGS = 30  # underlyings listed per book (largest residual first); the rest share one line
EXCEPTIONS_SHOWN = 50  # rows listed on a book page; the night's exceptions page lists them all
# Vega and vol P&L of positions held overnight by expiry bucket (time to expiry at the prior date) and by part.
VOL_PART_COLUMNS: tuple[str, ...] = ("vega_per_vol_point", "pnl_vega", "pnl_vol", "pnl_vol_level", "pnl_vol_skew",
                                     "pnl_vol_curvature", "pnl_vol_own", "pnl_smile_delta")
TOP_EXPOSURE_CHANGES = 10  # underlyings per book in the night-over-night comparison
EXPOSURE_CHANGE_COLUMNS: tuple[str, ...] = (
    "delta_cash_before", "delta_cash", "gamma_cash_1pct_before", "gamma_cash_1pct", "vega_before", "vega",
    "theta_before", "theta")
STRATEGY_COLUMNS: tuple[str, ...] = ("pnl_actual", "pnl_explained", "pnl_residual", "pnl_new_trade", "pnl_expiry",
                                     "pnl_amendment", "pnl_total", "vega_per_vol_point")


def expiry_buckets(tenors: tuple[str, ...]) -> tuple[tuple[float, str], ...]:
    """(upper end in years, label) per bucket: up to the first tenor, between each pair, and beyond the last."""
    ends = [tenor_years(t) for t in tenors]
    labels = [f"up to {tenors[0]}", *(f"{a} to {b}" for a, b in zip(tenors, tenors[1:], strict=False)),
              f"{tenors[-1]}+"]
    return tuple(zip([*ends, float("inf")], labels, strict=True))
POSITION_TEXT: tuple[str, ...] = ("trade_id", "instrument_id", "underlying", "status", "flags", "limit_state")
POSITION_VALUES: tuple[str, ...] = ("quantity", "quantity_run_date", *TERM_COLUMNS)


class ReportError(ValueError):
    """The archive cannot give a report for the date asked; the message says why."""



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
    vol_parts: pd.DataFrame
    dividend_schedule: pd.DataFrame = field(default_factory=pd.DataFrame)  # per book and underlying held tonight
    ex_dates: pd.DataFrame = field(default_factory=pd.DataFrame)           # per book and underlying gone ex tonight
    hedging: pd.DataFrame = field(default_factory=pd.DataFrame)  # per book and underlying: options, hedges
    currencies: pd.DataFrame = field(default_factory=pd.DataFrame)  # FX exposure per book and currency
    buckets: tuple[tuple[float, str], ...] = ()
    to_date_books: pd.DataFrame | None = None      # periods.to_date per book
    to_date_desks: pd.DataFrame | None = None      # periods.to_date per desk
    strategies: pd.DataFrame | None = None         # per book and strategy label
    exposure_changes: pd.DataFrame | None = None   # per book, the underlyings whose exposures moved most


def load_night(con: duckdb.DuckDBPyConnection, as_of: dt.date, history_nights: int,
               tenors: tuple[str, ...] = DEFAULT_EXPIRY_BUCKETS) -> NightFrames:
    """Read everything the night's pages show, with one query per kind of figure; ``tenors``: the upper ends of
    the expiry buckets (the job's ``[report] expiry_buckets``)."""
    buckets = expiry_buckets(tenors)
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
            -- ranked on two sums per (book, underlying); the shown ones summed whole, the rest in one line per book
            WITH n AS (SELECT book, underlying, sum(pnl_residual) AS residual, sum(pnl_total) AS total
                       FROM position_pnl WHERE as_of = ? GROUP BY book, underlying),
                 cut AS (SELECT book, list_min(max(abs(residual), ?)) AS least FROM n GROUP BY book),
                 top AS (SELECT n.book, n.underlying FROM n JOIN cut ON n.book = cut.book
                         WHERE abs(n.residual) >= cut.least OR n.residual IS NULL  -- the candidates only
                         QUALIFY row_number() OVER (PARTITION BY n.book ORDER BY abs(n.residual) DESC,
                                                    abs(n.total) DESC, n.underlying) <= ?),
                 others AS (SELECT n.book, count(*) AS underlyings FROM n ANTI JOIN top
                            ON n.book = top.book AND n.underlying IS NOT DISTINCT FROM top.underlying GROUP BY n.book)
            -- each part reads the rows it sums (semi and anti joins on the few shown pairs): no copy of the night's
            -- rows is kept between the two parts
            SELECT {underlying_cols} FROM (
                SELECT 0 AS rest, p.book, p.underlying, count(*) AS positions,
                       count(*) FILTER (WHERE status = 'new_unpriced') AS unpriced, {terms}
                FROM position_pnl p SEMI JOIN top
                     ON p.book = top.book AND p.underlying IS NOT DISTINCT FROM top.underlying
                WHERE p.as_of = ? GROUP BY p.book, p.underlying
                UNION ALL  -- the rest of a book's underlyings in one line (delta units do not add up across them)
                SELECT 1, p.book, '(' || any_value(o.underlyings) || ' other underlyings)', count(*)::BIGINT,
                       (count(*) FILTER (WHERE status = 'new_unpriced'))::BIGINT, {rest_terms}
                FROM position_pnl p JOIN others o ON p.book = o.book
                     ANTI JOIN top ON p.book = top.book AND p.underlying IS NOT DISTINCT FROM top.underlying
                WHERE p.as_of = ? GROUP BY p.book)
            ORDER BY book, rest, underlying""", [as_of, TOP_UNDERLYINGS, TOP_UNDERLYINGS, as_of, as_of]),
        positions=_frame(con, f"""
            WITH p AS (SELECT rowid AS r, book, abs(coalesce(pnl_residual, 0)) AS a FROM position_pnl WHERE as_of = ?),
                 -- the candidates: residuals at least the book's N-th largest; only they are ranked and read whole
                 cut AS (SELECT book, list_min(max(a, ?)) AS least FROM p GROUP BY book),
                 top AS (SELECT p.r FROM p JOIN cut ON p.book = cut.book WHERE p.a >= cut.least)
            SELECT book, {row_cols} FROM position_pnl WHERE as_of = ? AND rowid IN (SELECT r FROM top)
            QUALIFY row_number() OVER (PARTITION BY book ORDER BY abs(coalesce(pnl_residual, 0)) DESC,
                                       abs(coalesce(pnl_total, 0)) DESC, trade_id) <= ?
            ORDER BY book, abs(coalesce(pnl_residual, 0)) DESC, abs(coalesce(pnl_total, 0)) DESC, trade_id""",
                         [as_of, TOP_POSITIONS, as_of, TOP_POSITIONS]),
        unpriced=_frame(con, f"""SELECT book, {row_cols} FROM position_pnl
                                 WHERE as_of = ? AND status = 'new_unpriced' ORDER BY book, trade_id""", [as_of]),
        exceptions=_frame(con, f"""SELECT row_number() OVER (ORDER BY severity, file, rule, key) AS exception_id,
                                   {exception_cols} FROM input_exceptions WHERE as_of = ?""", [as_of]),
        links=_frame(con, f"""
            WITH e AS (SELECT row_number() OVER (ORDER BY severity, file, rule, key) AS exception_id,
                              {exception_cols} FROM input_exceptions WHERE as_of = ?),
                 keys AS (SELECT DISTINCT key FROM e),  -- only the keys of exceptions can match
                 k AS (SELECT book, trade_id AS key FROM position_pnl
                       WHERE as_of IN (?, ?) AND trade_id IN (SELECT key FROM keys)
                       UNION SELECT book, instrument_id FROM position_pnl
                       WHERE as_of = ? AND instrument_id IN (SELECT key FROM keys)
                       UNION SELECT book, underlying FROM position_pnl
                       WHERE as_of = ? AND underlying IN (SELECT key FROM keys)
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
        vol_parts=_vol_parts(con, as_of, buckets),
        buckets=buckets,
        to_date_books=to_date(con, as_of, "book"),
        to_date_desks=to_date(con, as_of, "desk"),
        strategies=_strategies(con, as_of),
        exposure_changes=_exposure_changes(con, as_of),
        hedging=_frame(con, HEDGING_SQL, [as_of, HEDGING_ROWS_SHOWN, HEDGING_ROWS_SHOWN]),
        # FX exposure: the run-date value of what each book holds, per premium currency, in that currency and
        # converted; a 1 % move of the rate changes the converted value by 1 % (the translation of the next night).
        currencies=_frame(con, """
            SELECT book, currency, count(*) FILTER (WHERE quantity_run_date <> 0) AS positions,
                   sum(coalesce(quantity_run_date * multiplier * price_run, 0)) AS value_local,
                   max(fx_rate) AS fx_rate,
                   sum(coalesce(quantity_run_date * multiplier * price_run * fx_rate, 0)) AS value_reporting,
                   sum(coalesce(quantity_run_date * multiplier * price_run * fx_rate, 0)) / 100 AS fx_move_1pct,
                   sum(pnl_fx_translation) AS pnl_fx_translation
            FROM position_pnl WHERE as_of = ? GROUP BY book, currency ORDER BY book, currency""", [as_of]),
        **(_dividends(con, as_of) if "dividend_schedule" in tables and _has_schedule(con, as_of) else {}),
    )


def _has_schedule(con: duckdb.DuckDBPyConnection, as_of: dt.date) -> bool:
    """Whether ``dividend_schedule`` holds a row of ``as_of`` (without one, both dividend queries read nothing)."""
    return con.execute("SELECT 1 FROM dividend_schedule WHERE as_of = ? LIMIT 1", [as_of]).fetchone() is not None


def _dividends(con: duckdb.DuckDBPyConnection, as_of: dt.date) -> dict[str, pd.DataFrame]:
    """Per book: the schedule in force for each underlying it holds tonight, and tonight's ex-date P&L."""
    schedule = _frame(con, """
        WITH held AS (SELECT DISTINCT book, underlying, currency FROM position_pnl
                      WHERE as_of = ? AND quantity_run_date <> 0),
             s AS (SELECT * FROM dividend_schedule WHERE as_of = ? AND NOT went_ex)
        SELECT h.book, s.underlying, s.currency, strftime(min(s.ex_date), '%Y-%m-%d') AS next_ex_date,
               arg_min(s.amount, s.ex_date) AS next_amount, arg_min(s.pv, s.ex_date) AS next_pv,
               count(*) AS dividends, strftime(max(s.ex_date), '%Y-%m-%d') AS last_ex_date, sum(s.pv) AS schedule_pv
        FROM held h JOIN s ON s.underlying = h.underlying AND s.currency = h.currency
        GROUP BY ALL ORDER BY h.book, s.underlying, s.currency""", [as_of, as_of])
    ex_dates = _frame(con, """
        WITH g AS (SELECT underlying, currency, sum(amount) AS amount FROM dividend_schedule
                   WHERE as_of = ? AND went_ex GROUP BY ALL)
        SELECT p.book, p.underlying, p.currency, any_value(g.amount) AS amount, count(*) AS positions,
               sum(p.pnl_delta) AS pnl_delta, sum(p.pnl_dividend) AS pnl_dividend,
               sum(CASE WHEN p.kind = 'underlying' AND p.status IN ('carried', 'closed')
                        THEN p.quantity * p.multiplier * p.fx_rate * g.amount ELSE 0 END) AS cash_dividends,
               sum(p.pnl_residual) AS pnl_residual, sum(p.pnl_total) AS pnl_total
        FROM position_pnl p JOIN g ON g.underlying = p.underlying AND g.currency = p.currency
        WHERE p.as_of = ? AND p.status IN ('carried', 'closed', 'expired')
        GROUP BY ALL ORDER BY p.book, p.underlying, p.currency""", [as_of, as_of])
    return {"dividend_schedule": schedule, "ex_dates": ex_dates}


def _vol_parts(con: duckdb.DuckDBPyConnection, as_of: dt.date, buckets: tuple[tuple[float, str], ...]) -> pd.DataFrame:
    """Per book and expiry bucket (index into ``buckets``): positions held overnight with a vol on both dates,
    their vega at the prior state and vol P&L by part."""
    ends = [end for end, _ in buckets]
    return _frame(con, """
        WITH b AS (SELECT unnest(range(?)) AS bucket, unnest(?::DOUBLE[]) AS lo, unnest(?::DOUBLE[]) AS hi)
        SELECT p.book, b.bucket, count(*) AS positions, sum(vega_per_vol_point) AS vega_per_vol_point,
               sum(pnl_vega) AS pnl_vega, sum(pnl_vega + pnl_volga) AS pnl_vol, sum(pnl_vol_level) AS pnl_vol_level,
               sum(pnl_vol_skew) AS pnl_vol_skew, sum(pnl_vol_curvature) AS pnl_vol_curvature,
               sum(pnl_vol_own) AS pnl_vol_own, sum(pnl_smile_delta) AS pnl_smile_delta
        FROM position_pnl p JOIN b ON p.tau_prior_years > b.lo AND p.tau_prior_years <= b.hi
        WHERE as_of = ? AND tau_prior_years IS NOT NULL AND vol_prior IS NOT NULL AND vol_run IS NOT NULL
        GROUP BY ALL ORDER BY book, bucket""", [len(ends), [float("-inf"), *ends[:-1]], ends, as_of])


def _strategies(con: duckdb.DuckDBPyConnection, as_of: dt.date) -> pd.DataFrame:
    """Per book and strategy label (NULL last): positions and P&L."""
    return _frame(con, """
        SELECT book, strategy, count(*) AS positions, sum(pnl_actual) AS pnl_actual,
               sum(pnl_explained) AS pnl_explained, sum(pnl_residual) AS pnl_residual,
               sum(pnl_new_trade) AS pnl_new_trade, sum(pnl_expiry) AS pnl_expiry,
               sum(pnl_amendment) AS pnl_amendment, sum(pnl_total) AS pnl_total,
               sum(vega_per_vol_point) AS vega_per_vol_point
        FROM position_pnl WHERE as_of = ? GROUP BY book, strategy ORDER BY book, strategy NULLS LAST""", [as_of])


def _exposure_changes(con: duckdb.DuckDBPyConnection, as_of: dt.date) -> pd.DataFrame:
    """Per book: the underlyings whose exposures at the prior state moved most since the previous archived night,
    ranked by the larger of |change of delta cash| / 100 (a 1 % move's P&L) and |change of vega per vol point|."""
    previous = con.execute("SELECT max(as_of) FROM runs WHERE as_of < ?", [as_of]).fetchone()
    # the two dates as values, so the scan reads only their row groups
    dates = [as_of, previous[0] if previous and previous[0] is not None else as_of]
    return _frame(con, """
        WITH prev AS (SELECT max(as_of) AS d FROM runs WHERE as_of < ?),
             x AS (SELECT as_of, book, underlying, sum(delta_cash) AS dc, sum(gamma_cash_1pct) AS g,
                          sum(vega_per_vol_point) AS v, sum(theta_per_calendar_day) AS t
                   FROM position_pnl WHERE as_of IN (?, ?) GROUP BY ALL),
             n AS (SELECT * FROM x WHERE as_of = ?), o AS (SELECT * FROM x WHERE as_of <> ?),
             j AS (SELECT coalesce(n.book, o.book) AS book, coalesce(n.underlying, o.underlying) AS underlying,
                          coalesce(o.dc, 0) AS delta_cash_before, coalesce(n.dc, 0) AS delta_cash,
                          coalesce(o.g, 0) AS gamma_cash_1pct_before, coalesce(n.g, 0) AS gamma_cash_1pct,
                          coalesce(o.v, 0) AS vega_before, coalesce(n.v, 0) AS vega,
                          coalesce(o.t, 0) AS theta_before, coalesce(n.t, 0) AS theta
                   FROM n FULL JOIN o ON n.book = o.book AND n.underlying = o.underlying),
             m AS (SELECT *, greatest(abs(delta_cash - delta_cash_before) / 100, abs(vega - vega_before)) AS moved
                   FROM j WHERE book IN (SELECT book FROM book_pnl WHERE as_of = ?)),
             -- ranked among the candidates only: moves at least the book's N-th largest
             cut AS (SELECT book, list_min(max(moved, ?)) AS least FROM m GROUP BY book)
        SELECT m.* EXCLUDE (moved), (SELECT d FROM prev) AS previous_as_of FROM m JOIN cut ON m.book = cut.book
        WHERE m.moved >= cut.least
        QUALIFY row_number() OVER (PARTITION BY m.book ORDER BY m.moved DESC, m.underlying) <= ?
        ORDER BY m.book, m.moved DESC, m.underlying""",
                  [as_of, *dates, as_of, as_of, as_of, TOP_EXPOSURE_CHANGES, TOP_EXPOSURE_CHANGES])



HEDGING_ROWS_SHOWN = 30  # underlyings in a book's hedging table (largest net delta first; its cash row kept)
# Per book and underlying: the options' and the hedges' (delta-one kinds') delta and P&L, side by side, the
# largest net delta first, with the book's sums over every underlying (book_options_pnl, ...). A row archived
# before instrument kinds existed (kind NULL) is an option; a book's cash row has no underlying.
HEDGING_SQL = """
    WITH p AS (SELECT book, underlying, coalesce(kind, 'option') = 'option' AS is_option, delta_units, delta_cash,
                      pnl_total - coalesce(pnl_cash, 0) AS pnl, coalesce(pnl_cash, 0) AS cash
               FROM position_pnl WHERE as_of = ?),
         g AS (SELECT book, coalesce(underlying, '(cash)') AS underlying, underlying IS NULL AS is_cash,
                      sum(delta_units) FILTER (WHERE is_option) AS options_delta_units,
                      sum(delta_units) FILTER (WHERE NOT is_option) AS hedges_delta_units,
                      sum(delta_units) AS book_delta_units,
                      sum(delta_cash) FILTER (WHERE is_option) AS options_delta_cash,
                      sum(delta_cash) FILTER (WHERE NOT is_option) AS hedges_delta_cash,
                      sum(delta_cash) AS book_delta_cash,
                      sum(pnl) FILTER (WHERE is_option) AS options_pnl,
                      sum(pnl) FILTER (WHERE NOT is_option) AS hedges_pnl,
                      sum(cash) AS cash_pnl
               FROM p GROUP BY book, underlying),
         -- the book's sums added in the table's order (cash row, largest book delta first): its rows sorted once,
         -- each sum added along them one by one as an ordered sum() adds (list_sum skips NULLs as sum does)
         o AS (SELECT book, list(struct_pack(o := options_pnl, h := hedges_pnl, c := cash_pnl)
                                 ORDER BY is_cash DESC, abs(book_delta_cash) DESC NULLS LAST, underlying) AS rows
               FROM g GROUP BY book),
         s AS (SELECT book, coalesce(list_sum([r.o FOR r IN rows]), 0) AS book_options_pnl,
                      coalesce(list_sum([r.h FOR r IN rows]), 0) AS book_hedges_pnl,
                      coalesce(list_sum([r.c FOR r IN rows]), 0) AS book_cash_pnl FROM o),
         -- ranked among the candidates only: the cash row and book deltas at least the book's N-th largest
         cut AS (SELECT book, list_min(max(abs(book_delta_cash), ?)) AS least FROM g WHERE NOT is_cash GROUP BY book),
         c AS (SELECT g.* FROM g LEFT JOIN cut ON g.book = cut.book
               WHERE g.is_cash OR g.book_delta_cash IS NULL OR abs(g.book_delta_cash) >= cut.least)
    SELECT c.* EXCLUDE (is_cash), s.book_options_pnl, s.book_hedges_pnl, s.book_cash_pnl
    FROM c JOIN s ON c.book = s.book
    QUALIFY row_number() OVER (PARTITION BY c.book ORDER BY c.is_cash DESC, abs(c.book_delta_cash) DESC NULLS LAST,
                                                           c.underlying) <= ?
    ORDER BY c.book, c.is_cash, abs(c.book_delta_cash) DESC NULLS LAST, c.underlying"""
HEDGING_VALUES: tuple[str, ...] = ("options_delta_units", "hedges_delta_units", "book_delta_units",
                                   "options_delta_cash", "hedges_delta_cash", "book_delta_cash",
                                   "options_pnl", "hedges_pnl", "cash_pnl")
