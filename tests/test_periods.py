"""Month- and year-to-date sums per book and desk at one night (attribution.periods.to_date)."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from attribution.archive import connect
from attribution.periods import to_date


@pytest.fixture()
def con(tmp_path):
    """Three books over 50 nights from 2025-12-15; B3 moves from desk Rates to desk FX on 2026-01-10."""
    c = connect(tmp_path / "p.duckdb")
    rng = np.random.default_rng(5)
    rows = []
    for d in pd.date_range("2025-12-15", periods=50, freq="D"):
        for book in ("B1", "B2", "B3"):
            desk = "FX" if book == "B1" or (book == "B3" and d >= pd.Timestamp("2026-01-10")) else "Rates"
            rows.append((d, book, desk, float(rng.normal(0, 100)), "breach" if rng.random() < 0.2 else "within"))
    frame = pd.DataFrame(rows, columns=["as_of", "book", "desk", "pnl_residual", "limit_state"])
    c.execute("INSERT INTO book_pnl (as_of, book, desk, pnl_residual, limit_state) "
              "SELECT as_of::DATE, book, desk, pnl_residual, limit_state FROM frame")
    yield c, frame
    c.close()


def test_book_to_date_sums_the_nights_of_the_month_and_year(con):
    """A book's MTD and YTD are the sums of its nights since the 1st of the month and of January (pandas)."""
    c, frame = con
    as_of = dt.date(2026, 2, 2)
    got = to_date(c, as_of, "book").set_index("book")
    upto = frame[frame["as_of"] <= pd.Timestamp(as_of)]
    month = upto[upto["as_of"] >= pd.Timestamp("2026-02-01")]
    year = upto[upto["as_of"] >= pd.Timestamp("2026-01-01")]
    np.testing.assert_allclose(got["pnl_residual_mtd"], month.groupby("book")["pnl_residual"].sum(), rtol=1e-12)
    np.testing.assert_allclose(got["pnl_residual_ytd"], year.groupby("book")["pnl_residual"].sum(), rtol=1e-12)
    assert got["breaches_ytd"].tolist() == (year["limit_state"] == "breach").groupby(year["book"]).sum().tolist()


def test_desk_to_date_follows_each_nights_desk(con):
    """A desk's YTD takes each night's books of that desk: a book that moved counts where it was that night."""
    c, frame = con
    as_of = dt.date(2026, 1, 31)
    got = to_date(c, as_of, "desk").set_index("desk")
    year = frame[(frame["as_of"] >= pd.Timestamp("2026-01-01")) & (frame["as_of"] <= pd.Timestamp(as_of))]
    np.testing.assert_allclose(got["pnl_residual_ytd"], year.groupby("desk")["pnl_residual"].sum(), rtol=1e-12)
    with pytest.raises(ValueError, match="key must be"):
        to_date(c, as_of, "trade_id")
