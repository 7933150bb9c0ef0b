"""Desk roll-ups, month- and year-to-date, strategies, exposure changes, official break and rejected size on the
pages (attribution.report), each checked against SQL sums over the archive of an invented night."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import duckdb
import pytest
from report_fixtures import AS_OF, PRIOR, PageParser, build_archive, shown_number

from attribution import report
from attribution.config import JobConfig
from attribution.report.queries import expiry_buckets

BOOKS = ("Vol Arb North", "Index Gamma", "Rates Carry")
DESKS = {"Vol Arb North": "Equity vol", "Index Gamma": "Equity vol", "Rates Carry": "Rates"}


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> tuple[duckdb.DuckDBPyConnection, Path]:
    """The invented night with desks on every archived night, strategy labels on half the trades, an official P&L
    for one book, a rejected position's size, and the prior night's positions archived with other exposures."""
    root = tmp_path_factory.mktemp("desks")
    con = build_archive(root / "archive.duckdb", BOOKS, per_book=12)
    con.execute("UPDATE book_pnl SET desk = CASE book WHEN 'Rates Carry' THEN 'Rates' ELSE 'Equity vol' END")
    con.execute("UPDATE position_pnl SET strategy = CASE WHEN right(trade_id, 1) IN ('1', '3', '5', '7', '9') "
                "THEN 'straddle' WHEN right(trade_id, 1) IN ('2', '4') THEN 'risk reversal' END")
    con.execute("UPDATE book_pnl SET official_pnl = pnl_total + 1234.5, official_break = 1234.5 "
                "WHERE book = 'Index Gamma' AND as_of = ?", [AS_OF])
    con.execute("UPDATE book_pnl SET rejected_prior_value = 98765.4, rejected_vega_per_vol_point = -321.0, "
                "rejected_unvalued = 1, rejected = 2 WHERE book = 'Vol Arb North' AND as_of = ?", [AS_OF])
    con.execute("DELETE FROM position_pnl WHERE as_of = ?", [PRIOR])
    con.execute("INSERT INTO position_pnl SELECT * REPLACE (?::DATE AS as_of, vega_per_vol_point * 0.5 + 100 AS "
                "vega_per_vol_point, delta_cash * 2 AS delta_cash) FROM position_pnl WHERE as_of = ?", [PRIOR, AS_OF])
    con.execute("INSERT INTO runs (run_id, as_of, status) VALUES ('run-prior', ?, 'ok')", [PRIOR])
    index = report.render_night(con, AS_OF, root / "reports", JobConfig())
    return con, index


def _page(index: Path, name: str) -> PageParser:
    return PageParser((index.parent / name).read_text(encoding="utf-8"))


def _sql_sum(con: duckdb.DuckDBPyConnection, column: str, where: str, params: list[object]) -> float:
    return con.execute(f"SELECT sum({column}) FROM book_pnl WHERE {where}", params).fetchone()[0]


def test_index_groups_books_by_desk_with_the_desks_sums(night) -> None:
    """Each desk line heads its books and shows their night's sums and to-date totals (SQL over book_pnl)."""
    con, index = night
    rows = _page(index, "index.html").tables["book-table"][1:]
    heads = [i for i, r in enumerate(rows) if r[0] not in BOOKS]
    assert sorted(rows[i][0] for i in heads) == ["Equity vol 2 books", "Rates 1 book"]
    for start, end in zip(heads, [*heads[1:], len(rows)], strict=True):
        desk = rows[start][0].rsplit(" ", 2)[0]
        members = {r[0] for r in rows[start + 1:end]}
        assert members == {b for b, d in DESKS.items() if d == desk}
        total = _sql_sum(con, "pnl_total", "as_of = ? AND desk = ?", [AS_OF, desk])
        residual = _sql_sum(con, "pnl_residual", "as_of = ? AND desk = ?", [AS_OF, desk])
        ytd = _sql_sum(con, "pnl_total", "as_of BETWEEN ? AND ? AND desk = ?", [dt.date(2026, 1, 1), AS_OF, desk])
        assert shown_number(rows[start][1]) == pytest.approx(total, abs=0.5)
        assert shown_number(rows[start][4]) == pytest.approx(residual, abs=0.5)
        assert shown_number(rows[start][7]) == pytest.approx(ytd, abs=0.5)


def test_desk_page_lists_its_books_and_the_night_month_and_year_to_date(night) -> None:
    """A desk page (linked from the index and from its books) has its books only, a total row and the to-date
    table of every term, each equal to SQL sums over the desk's archived nights."""
    con, index = night
    name = report.file_name_for("Equity vol", "desk")
    assert f'href="{name}"' in (index.parent / "index.html").read_text(encoding="utf-8")
    assert f'href="{name}"' in (index.parent / report.file_name_for("Index Gamma")).read_text(encoding="utf-8")
    page = _page(index, name)
    assert page.text("desk-name") == "Equity vol"
    rows = page.tables["book-table"][1:]
    assert {r[0] for r in rows[:-1]} == {"Vol Arb North", "Index Gamma"} and rows[-1][0] == "Desk total"
    table = {r[0]: r[1:] for r in page.tables["to-date-table"][1:]}
    for term, label in (("pnl_total", "Total P&L"), ("pnl_theta", "Theta"), ("pnl_residual", "Residual")):
        night_sum = _sql_sum(con, term, "as_of = ? AND desk = 'Equity vol'", [AS_OF])
        mtd = _sql_sum(con, term, "as_of BETWEEN ? AND ? AND desk = 'Equity vol'", [AS_OF.replace(day=1), AS_OF])
        ytd = _sql_sum(con, term, "as_of BETWEEN ? AND ? AND desk = 'Equity vol'", [dt.date(2026, 1, 1), AS_OF])
        assert [shown_number(c) for c in table[label]] == [pytest.approx(night_sum, abs=0.5),
                                                           pytest.approx(mtd, abs=0.5), pytest.approx(ytd, abs=0.5)]


def test_book_page_to_date_table_and_tiles(night) -> None:
    """The book page's to-date table sums the book's archived nights of the month and year; the tile agrees."""
    con, index = night
    page = _page(index, report.file_name_for("Rates Carry"))
    table = {r[0]: r[1:] for r in page.tables["to-date-table"][1:]}
    for term, label in (("pnl_total", "Total P&L"), ("pnl_residual", "Residual"), ("pnl_vega", "Vega")):
        mtd = _sql_sum(con, term, "as_of BETWEEN ? AND ? AND book = 'Rates Carry'", [AS_OF.replace(day=1), AS_OF])
        ytd = _sql_sum(con, term, "as_of BETWEEN ? AND ? AND book = 'Rates Carry'", [dt.date(2026, 1, 1), AS_OF])
        assert shown_number(table[label][1]) == pytest.approx(mtd, abs=0.5)
        assert shown_number(table[label][2]) == pytest.approx(ytd, abs=0.5)
    assert page.value("fig-pnl_total_ytd") == pytest.approx(
        _sql_sum(con, "pnl_total", "as_of BETWEEN ? AND ? AND book = 'Rates Carry'", [dt.date(2026, 1, 1), AS_OF]))
    assert table["Official P&L break (official - total)"] == ["—", "—", "—"]  # no official P&L: a dash, not 0


def test_strategy_table_sums_the_books_positions_by_label(night) -> None:
    """One row per strategy label (unlabelled positions on their own row), each the SQL sum of its positions."""
    con, index = night
    rows = _page(index, report.file_name_for("Index Gamma")).tables["strategy-table"][1:]
    want = con.execute("SELECT coalesce(strategy, '(no strategy label)'), count(*), sum(pnl_total), "
                       "sum(pnl_residual) FROM position_pnl WHERE as_of = ? AND book = 'Index Gamma' "
                       "GROUP BY strategy ORDER BY strategy NULLS LAST", [AS_OF]).fetchall()
    assert [(r[0], int(r[1])) for r in rows] == [(w[0], w[1]) for w in want]
    for row, w in zip(rows, want, strict=True):
        assert shown_number(row[8]) == pytest.approx(w[2], abs=0.5)
        assert shown_number(row[4]) == pytest.approx(w[3], abs=0.5)


def test_exposure_changes_compare_with_the_previous_archived_night(night) -> None:
    """At most ten underlyings, each with its exposures of both nights as the SQL sums of the two nights' rows."""
    con, index = night
    page = _page(index, report.file_name_for("Vol Arb North"))
    assert PRIOR.isoformat() in page.text("exposure-changes")
    rows = page.tables["exposure-change-table"][1:]
    assert 0 < len(rows) <= 10
    for row in rows:
        sums = {d: con.execute("SELECT sum(delta_cash), sum(vega_per_vol_point) FROM position_pnl WHERE as_of = ? "
                               "AND book = 'Vol Arb North' AND underlying = ?", [d, row[0]]).fetchone()
                for d in (PRIOR, AS_OF)}
        assert shown_number(row[1]) == pytest.approx(sums[PRIOR][0], abs=0.5)
        assert shown_number(row[2]) == pytest.approx(sums[AS_OF][0], abs=0.5)
        assert shown_number(row[5]) == pytest.approx(sums[PRIOR][1], abs=0.5)
        assert shown_number(row[6]) == pytest.approx(sums[AS_OF][1], abs=0.5)


def test_official_break_and_rejected_size_are_shown(night) -> None:
    """A book with an official P&L shows its break; a book that left positions out shows their prior value and vega."""
    _, index = night
    gamma = _page(index, report.file_name_for("Index Gamma"))
    assert gamma.value("fig-official_break") == pytest.approx(1234.5)
    north = _page(index, report.file_name_for("Vol Arb North"))
    assert "fig-official_break" not in north.by_id
    text = north.text("rejected-size")
    assert "98,765" in text and "-321" in text and "1 of them not valued" in text


def test_expiry_buckets_follow_the_tenors_given() -> None:
    """Buckets end at each tenor (1W = 7/365, 1M = 1/12 year) and one more holds what is beyond the last."""
    assert expiry_buckets(("1W", "1M", "5Y")) == ((7 / 365, "up to 1W"), (1 / 12, "1W to 1M"), (5.0, "1M to 5Y"),
                                                   (float("inf"), "5Y+"))
