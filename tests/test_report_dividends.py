"""The book page's dividend tables (schedule in force, ex-date P&L) against the archive and QuantLib discounting."""

from __future__ import annotations

from pathlib import Path

import duckdb
import pytest
from report_fixtures import PageParser

from attribution import report
from attribution.cli import main
from tests.dividend_desk import BOOK, KEL, RUN, dividend_pv, write_dividend_desk


@pytest.fixture(scope="module")
def page(tmp_path_factory: pytest.TempPathFactory) -> tuple[PageParser, Path]:
    root = tmp_path_factory.mktemp("divreport")
    write_dividend_desk(root / "data")
    code = main(["run", "--as-of", RUN.isoformat(), "--data", str(root / "data"),
                 "--archive", str(root / "a.duckdb"), "--reports", str(root / "reports")])
    assert code == 0
    folder = next((root / "reports").glob("*"))
    return PageParser((folder / report.file_name_for(BOOK)).read_text(encoding="utf-8")), root / "a.duckdb"


def _number(text: str) -> float:
    return float(text.replace(",", "").replace("\u2212", "-"))


def test_schedule_shows_next_ex_date_amount_and_present_value(page) -> None:
    """KEL's next dividend (2026-06-10, 1.50) and its present value on QuantLib's curve (4 decimals shown)."""
    parser, _ = page
    rows = {r[0]: r for r in parser.tables["dividend-schedule-table"][1:]}
    assert set(rows) == {"KEL"}  # MOR has no rows, SPL none either
    _, currency, next_ex, amount, pv, count, last_ex, pv_all = rows["KEL"]
    assert (currency, next_ex, count, last_ex) == ("USD", "2026-06-10", "1", "2026-06-10")
    assert _number(amount) == 1.5
    assert _number(pv) == pytest.approx(dividend_pv(RUN, KEL[0]), abs=5e-5)
    assert _number(pv_all) == pytest.approx(dividend_pv(RUN, KEL[0]), abs=5e-5)


def test_ex_date_pnl_by_underlying_equals_the_archive(page) -> None:
    """The ex-date row of KEL sums the archived delta, dividend, residual and total of its positions."""
    parser, archive = page
    rows = {r[0]: r for r in parser.tables["ex-date-table"][1:]}
    assert set(rows) == {"KEL"}
    con = duckdb.connect(str(archive), read_only=True)
    sums = con.execute("SELECT count(*), sum(pnl_delta), sum(pnl_dividend), sum(pnl_residual), sum(pnl_total) "
                       "FROM position_pnl WHERE as_of = ? AND underlying = 'KEL'", [RUN]).fetchone()
    con.close()
    _, currency, positions, amount, delta, dividend, cash, residual, total = rows["KEL"]
    assert currency == "USD" and int(positions) == sums[0] and _number(amount) == 2.0
    for shown, value in ((delta, sums[1]), (dividend, sums[2]), (residual, sums[3]), (total, sums[4])):
        assert _number(shown) == pytest.approx(value, abs=0.5)  # whole units shown
    assert _number(cash) == 0.0  # no holder of the underlying itself in this book
    assert _number(delta) < -1000 and _number(dividend) > 1000  # the spot drop and its offset
