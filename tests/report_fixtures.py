"""A small invented archive for the report tests and the report benchmark (demo data, not a reference).

``build_archive`` creates the five archive tables from ``attribution.schema.TABLES`` in a DuckDB
file and fills one night: every position status, a book-level row per book summed from the
positions in SQL, ``history_nights`` earlier nights of ``book_pnl``, quality rows for all books
but the last, input exceptions (one matched to a book only through its prior-date trade) and a
run record. The tickers and books are invented.
"""

from __future__ import annotations

import datetime as dt
import json
from html.parser import HTMLParser
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd

from attribution.schema import EXPOSURE_COLUMNS, PNL_COLUMNS, REVAL_COLUMNS, TABLES, TAYLOR_TERMS

AS_OF = dt.date(2026, 3, 16)          # a Monday
PRIOR = dt.date(2026, 3, 13)          # the Friday before
UNDERLYINGS = ("KRLX", "VOMB", "TAPR", "EURXAU")
# status of the position at each index within a book; the rest are carried
STATUS_CYCLE = ("new", "new_unpriced", "closed", "expired", "carried")
TERM_SCALE = {"delta": 5_000.0, "gamma": 600.0, "vega": 2_000.0, "volga": 120.0, "vanna": 150.0,
              "theta": 400.0, "rates": 30.0, "dividend": 15.0}


def create_tables(con: duckdb.DuckDBPyConnection) -> None:
    """CREATE TABLE for every archive table, columns and types from schema.TABLES."""
    for name, columns in TABLES.items():
        con.execute(f"CREATE TABLE {name} ({', '.join(f'{c} {t}' for c, t in columns)})")


def insert_frame(con: duckdb.DuckDBPyConnection, table: str, frame: pd.DataFrame) -> None:
    """Append ``frame`` to ``table``; columns the frame lacks are NULL."""
    cols = [c for c, _ in TABLES[table] if c in frame.columns]
    con.register("incoming_rows", frame)
    try:
        con.execute(f"INSERT INTO {table} ({', '.join(cols)}) SELECT {', '.join(cols)} FROM incoming_rows")
    finally:
        con.unregister("incoming_rows")


def _positions(books: tuple[str, ...], per_book: int, rng: np.random.Generator) -> pd.DataFrame:
    """Position rows of the night, consistent with the archive identities."""
    n = len(books) * per_book
    book_idx = np.repeat(np.arange(len(books)), per_book)
    slot = np.tile(np.arange(per_book), len(books))
    status = np.array([STATUS_CYCLE[min(s, len(STATUS_CYCLE) - 1)] for s in slot], dtype=object)
    held = np.isin(status, ["carried", "closed"])
    frame = pd.DataFrame({
        "as_of": AS_OF, "prior_as_of": PRIOR, "book": np.array(books, dtype=object)[book_idx],
        "trade_id": [f"T{b:05d}-{s:03d}" for b, s in zip(book_idx, slot, strict=True)],
        "underlying": np.array(UNDERLYINGS, dtype=object)[(slot + book_idx) % len(UNDERLYINGS)],
        "currency": "USD", "status": status, "option_type": np.where(slot % 2 == 0, "call", "put"),
        "strike": 100.0 + slot, "expiry": AS_OF + dt.timedelta(days=90), "multiplier": 100.0, "fx_rate": 1.0,
        "quantity": np.where(status == "new", 0.0, 10.0 + slot), "quantity_run_date": 10.0 + slot,
    })
    frame["instrument_id"] = frame["underlying"] + "-" + frame["option_type"] + "-" + (100 + slot).astype(str)
    for term, scale in TERM_SCALE.items():
        frame[f"pnl_{term}"] = np.where(held, rng.normal(0.0, scale, n), 0.0)
    frame["pnl_theta"] = -np.abs(frame["pnl_theta"])
    explained = frame[[f"pnl_{t}" for t in TAYLOR_TERMS]].sum(axis=1).to_numpy()
    higher = np.where(held, rng.normal(0.0, 60.0, n), 0.0)
    gap = np.where(held, rng.normal(0.0, 400.0, n), 0.0)
    gap[(book_idx == 0) & (slot == per_book - 1)] = 30_000.0  # one position breach, and a book breach
    frame["pnl_explained"], frame["pnl_model"] = explained, explained + higher
    frame["pnl_actual"] = explained + higher + gap
    frame["pnl_residual"] = frame["pnl_actual"] - frame["pnl_explained"]
    frame["pnl_higher_order"], frame["pnl_mark_gap"] = higher, gap
    frame["pnl_new_trade"] = np.where(status == "new", rng.normal(0.0, 800.0, n), 0.0)
    frame.loc[status == "new_unpriced", "pnl_new_trade"] = np.nan
    frame["pnl_expiry"] = np.where(status == "expired", rng.normal(0.0, 900.0, n), 0.0)
    amended = (slot == len(STATUS_CYCLE)) & (per_book > len(STATUS_CYCLE))
    frame["pnl_amendment"] = np.where(amended, rng.normal(0.0, 300.0, n), 0.0)
    frame["flags"] = np.where(amended, "amended,vol_solved", np.where(status == "new_unpriced", "unpriced", ""))
    euro = (frame["underlying"] == "EURXAU").to_numpy()  # priced in EUR: the rows with an FX translation
    frame.loc[euro, "currency"], frame.loc[euro, "fx_rate"] = "EUR", 1.1
    frame["price_run"] = np.where(status == "expired", np.nan, 4.0 + slot % 3)
    frame["pnl_fx_translation"] = np.where(euro & (status != "new") & (status != "new_unpriced"),
                                           rng.normal(0.0, 500.0, n), 0.0)
    frame["pnl_cash"] = 0.0
    frame["pnl_total"] = (frame["pnl_actual"] + frame["pnl_new_trade"].fillna(0.0) + frame["pnl_expiry"]
                          + frame["pnl_amendment"] + frame["pnl_fx_translation"])
    others = {"vol": frame["pnl_vega"] + frame["pnl_volga"] + 0.5 * frame["pnl_vanna"],
              "time": frame["pnl_theta"], "rates": frame["pnl_rates"], "dividend": frame["pnl_dividend"]}
    for factor, values in others.items():
        frame[f"reval_{factor}"] = values
    frame["reval_spot"] = frame["pnl_model"] - sum(others.values())
    for k, col in enumerate(EXPOSURE_COLUMNS):
        frame[col] = np.where(status == "new", 0.0, rng.normal(0.0, 1_000.0 * (k + 1), n))
    frame["limit_state"] = np.select([frame["pnl_residual"].abs() > 10_000, frame["pnl_residual"].abs() > 8_000],
                                     ["breach", "watch"], "within")
    return frame


def _book_rows(con: duckdb.DuckDBPyConnection) -> None:
    """book_pnl of the night, summed from position_pnl in SQL, limit 25,000 or 10 % of |actual|."""
    sums = ", ".join(f"sum({c}) AS {c}" for c in (*PNL_COLUMNS, *REVAL_COLUMNS, *EXPOSURE_COLUMNS, "pnl_fx_translation",
                                                  "pnl_cash"))
    counts = ", ".join(f"count(*) FILTER (WHERE status = '{s}') AS {s}"
                       for s in ("carried", "new", "new_unpriced", "closed", "expired"))
    con.execute(f"""
        INSERT INTO book_pnl BY NAME
        SELECT *, CASE WHEN abs(pnl_residual) > residual_limit THEN 'breach'
                       WHEN abs(pnl_residual) > 0.8 * residual_limit THEN 'watch' ELSE 'within' END AS limit_state
        FROM (SELECT as_of, prior_as_of, book, count(*) AS positions, {counts}, 0 AS rejected, 0 AS warnings,
                     {sums}, greatest(25000.0, 0.1 * abs(sum(pnl_actual))) AS residual_limit,
                     count(*) FILTER (WHERE limit_state = 'breach') AS position_breaches
              FROM position_pnl WHERE as_of = ? GROUP BY as_of, prior_as_of, book)""", [AS_OF])


def _history(books: tuple[str, ...], nights: int, rng: np.random.Generator) -> pd.DataFrame:
    """book_pnl rows of the ``nights`` business days before the prior date and of the prior date."""
    days = np.busday_offset(np.datetime64(PRIOR, "D"), -np.arange(nights)[::-1], roll="backward")
    dates = [d.astype(dt.date) for d in days]
    grid = pd.MultiIndex.from_product([list(books), dates], names=["book", "as_of"]).to_frame(index=False)
    explained = rng.normal(0.0, 20_000.0, len(grid))
    residual = rng.normal(0.0, 2_000.0, len(grid))
    grid["prior_as_of"] = grid["as_of"].map(lambda d: d - dt.timedelta(days=1))
    grid["pnl_explained"], grid["pnl_residual"] = explained, residual
    grid["pnl_actual"] = explained + residual
    grid["pnl_total"] = grid["pnl_actual"]
    grid["limit_state"] = "within"
    return grid


def _quality(books: tuple[str, ...]) -> pd.DataFrame:
    """Quality rows for every book but the last (which shows "not yet computed")."""
    rated = books[:-1] if len(books) > 1 else books[:0]
    zones = np.array(["green", "amber", "red"], dtype=object)[np.arange(len(rated)) % 3]
    return pd.DataFrame({
        "as_of": AS_OF, "book": list(rated), "nights": 66, "provisional": True,
        "spearman": np.linspace(0.95, 0.55, len(rated)) if len(rated) else [], "ks": 0.07,
        "zone": zones, "mean_ratio": 0.04, "variance_ratio": 0.12, "spearman_60": 0.81, "ks_60": 0.08,
        "zone_60": "amber", "early_warning": np.where(zones == "green", "the latest 60 nights are amber", ""),
    })


def _exceptions(books: tuple[str, ...], positions: pd.DataFrame) -> pd.DataFrame:
    """A rejected prior-date trade of the first book, a warning on an instrument and one on an underlying."""
    first = positions[positions["book"] == books[0]]
    return pd.DataFrame({
        "as_of": AS_OF,
        "file": ["positions.parquet", "option_marks.parquet", "underlying_marks.parquet", "fx_rates.parquet"],
        "key": ["TREJ-0001", first["instrument_id"].iloc[0], "TAPR", "XAU"],
        "rule": ["instrument_id must exist in instruments", "implied vol disagrees with price",
                 "mark unchanged while underlying moved", "rate must be > 0"],
        "detail": ["instrument <missing> not found", "marked vol 0.31 vs solved 0.24",
                   "spot 41.20 unchanged since 2026-03-13", "rate -1.0"],
        "severity": ["rejected", "warning", "warning", "rejected"],
    })


def build_archive(path: Path, books: tuple[str, ...], per_book: int = 12, history_nights: int = 65,
                  seed: int = 7, time_basis: str = "ACT/365F") -> duckdb.DuckDBPyConnection:
    """Create and fill an archive at ``path``; return the open connection."""
    rng = np.random.default_rng(seed)
    con = duckdb.connect(str(path))
    create_tables(con)
    positions = _positions(books, per_book, rng)
    insert_frame(con, "position_pnl", positions)
    prior_trade = positions.iloc[[0]].assign(as_of=PRIOR, prior_as_of=PRIOR - dt.timedelta(days=1),
                                             trade_id="TREJ-0001", status="carried")
    insert_frame(con, "position_pnl", prior_trade)
    _book_rows(con)
    con.execute("UPDATE book_pnl SET rejected = 1 WHERE as_of = ? AND book = ?", [AS_OF, books[0]])
    insert_frame(con, "book_pnl", _history(books, history_nights, rng))
    insert_frame(con, "book_quality", _quality(books))
    insert_frame(con, "input_exceptions", _exceptions(books, positions))
    insert_frame(con, "runs", pd.DataFrame({
        "run_id": ["run-20260316-1"], "as_of": [AS_OF], "prior_as_of": [PRIOR],
        "started_at": [dt.datetime(2026, 3, 16, 19, 0)], "finished_at": [dt.datetime(2026, 3, 16, 19, 2)],
        "status": ["ok"], "tool_version": ["0.1.0"], "input_hashes": ["{}"],
        "job_settings": [json.dumps({"time_basis": time_basis, "reporting_currency": "USD"})],
        "positions_in": [len(positions) + 1], "positions_archived": [len(positions)], "positions_rejected": [1],
        "warnings": [2], "book_breaches": [1], "position_breaches": [1], "exit_code": [0], "seconds": [1.5]}))
    return con


VOID_TAGS = frozenset({"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source",
                       "track", "wbr"})


class PageParser(HTMLParser):
    """Reads a rendered page: every start tag, the text and attributes of each element with an id,
    and the cell texts of every table with an id."""

    def __init__(self, text: str) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.by_id: dict[str, dict[str, object]] = {}
        self.tables: dict[str, list[list[str]]] = {}
        self._open: list[str | None] = []
        self._table: str | None = None
        self._cell: list[str] | None = None
        self.feed(text)
        self.close()

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        """Record the tag; open an id'd element, a table row or a cell."""
        found = dict(attrs)
        self.tags.append((tag, found))
        ident = found.get("id")
        if ident:
            self.by_id[ident] = {"attrs": found, "text": ""}
        if tag == "table" and ident:
            self._table = ident
            self.tables[ident] = []
        elif tag == "tr" and self._table:
            self.tables[self._table].append([])
        elif tag in ("td", "th") and self._table:
            self._cell = []
            self.tables[self._table][-1].append("")
        if tag not in VOID_TAGS:
            self._open.append(ident)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        """A self-closed element (SVG): recorded, never left open."""
        self.handle_starttag(tag, attrs)
        if tag not in VOID_TAGS:
            self._open.pop()

    def handle_endtag(self, tag: str) -> None:
        """Close the innermost element; leave a table at its end."""
        if tag == "table":
            self._table = None
        if tag in ("td", "th"):
            self._cell = None
        if tag not in VOID_TAGS and self._open:
            self._open.pop()

    def handle_data(self, data: str) -> None:
        """Text goes to every open element with an id and to the open cell."""
        for ident in self._open:
            if ident:
                self.by_id[ident]["text"] = str(self.by_id[ident]["text"]) + data
        if self._cell is not None and self._table:
            self.tables[self._table][-1][-1] += data

    def value(self, ident: str) -> float:
        """The data-value attribute of an element, as a float (NaN when empty)."""
        raw = dict(self.by_id[ident]["attrs"]).get("data-value")  # type: ignore[arg-type]
        return float(raw) if raw else float("nan")

    def text(self, ident: str) -> str:
        """The text content of an element, whitespace collapsed."""
        return " ".join(str(self.by_id[ident]["text"]).split())


def shown_number(text: str) -> float | None:
    """A figure as the page shows it (``-1,234``) back to a float; None for the missing-value dash."""
    text = text.strip()
    return None if text in ("—", "") else float(text.replace(",", ""))
